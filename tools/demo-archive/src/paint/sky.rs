//! The sky band: its gradient by time and weather, sun, moon, stars and clouds.

use super::{Painter, WHITE};
use crate::raster::{mix, Rgb};
use crate::scene::{TimeOfDay, Weather};
use rand::Rng;

impl<R: Rng> Painter<'_, R> {
    pub(super) fn sky(&mut self) {
        let (top, low) = match self.scene.time {
            TimeOfDay::Day => ([55.0, 105.0, 195.0], [165.0, 200.0, 235.0]),
            TimeOfDay::Dusk => {
                let options = [
                    ([60.0, 40.0, 105.0], [240.0, 130.0, 60.0]),
                    ([95.0, 50.0, 120.0], [250.0, 170.0, 90.0]),
                    ([40.0, 30.0, 80.0], [225.0, 100.0, 80.0]),
                ];
                options[self.rng.random_range(0..3)]
            }
            TimeOfDay::Night => ([5.0, 8.0, 25.0], [22.0, 32.0, 66.0]),
        };
        let mut top = self.jit(top, 0.1);
        let mut low = self.jit(low, 0.1);
        let overcast = match self.scene.weather {
            Weather::Clear => 0.0,
            Weather::Fog => 0.3,
            _ => 0.55,
        };
        for col in [&mut top, &mut low] {
            let grey = (col[0] + col[1] + col[2]) / 3.0 * 0.9;
            *col = mix(*col, [grey; 3], overcast);
        }
        self.sky_low = low;
        let (w, hz) = (self.c.w(), self.horizon);
        self.c.gradient(0.0, hz + 1.0, top, low);
        match self.scene.time {
            TimeOfDay::Night => self.stars(top),
            TimeOfDay::Dusk => {
                let (x, r) = (self.u(0.1, 0.9) * w, self.u(5.0, 11.0));
                let y = hz - r * self.u(-0.2, 0.6);
                self.c.circle(x, y, r * 2.2, [255.0, 190.0, 110.0], 0.25);
                self.c.circle(x, y, r, [255.0, 215.0, 130.0], 0.9);
            }
            TimeOfDay::Day => {}
        }
        if self.scene.weather != Weather::Clear || self.scene.time == TimeOfDay::Day {
            let clouds = self.rng.random_range(0..5);
            let shade = if self.scene.weather == Weather::Rain {
                [100.0, 102.0, 108.0]
            } else {
                mix(WHITE, top, 0.15)
            };
            for _ in 0..clouds {
                let (cx, cy) = (self.u(0.0, w), self.u(0.1, 0.75) * hz);
                for _ in 0..self.rng.random_range(3..6) {
                    let (dx, dy) = (self.u(-12.0, 12.0), self.u(-3.0, 3.0));
                    let (rx, ry) = (self.u(6.0, 14.0), self.u(3.0, 6.0));
                    self.c.ellipse(cx + dx, cy + dy, rx, ry, shade, 0.75);
                }
            }
        }
    }

    fn stars(&mut self, top: Rgb) {
        let n = if self.scene.weather == Weather::Clear {
            70
        } else {
            20
        };
        let (w, hz) = (self.c.w(), self.horizon);
        for _ in 0..self.rng.random_range(n / 2..n) {
            let (x, y) = (self.u(0.0, w), self.u(0.0, hz - 4.0));
            let a = self.u(0.5, 1.0);
            if self.rng.random_bool(0.2) {
                self.c.circle(x, y, 1.0, [255.0, 250.0, 225.0], a);
            } else {
                self.c.blend(x as i64, y as i64, [255.0, 250.0, 235.0], a);
            }
        }
        if self.rng.random_bool(0.4) {
            let (x, y, r) = (
                self.u(0.1, 0.9) * w,
                self.u(0.1, 0.5) * hz,
                self.u(4.0, 7.0),
            );
            self.c.circle(x, y, r, [240.0, 235.0, 200.0], 1.0);
            if self.rng.random_bool(0.5) {
                let shadow = mix(top, self.sky_low, y / hz);
                self.c.circle(x + r * 0.5, y - r * 0.2, r, shadow, 1.0);
            }
        }
    }
}
