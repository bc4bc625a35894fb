//! Last passes over the whole picture: weather in front of everything, then the print's finish.

use super::{Finish, Painter};
use crate::raster::mix;
use crate::scene::{TimeOfDay, Weather};
use rand::Rng;

impl<R: Rng> Painter<'_, R> {
    pub(super) fn weather(&mut self) {
        let (w, h, hz) = (self.c.w(), self.c.h(), self.horizon);
        let night = self.scene.time == TimeOfDay::Night;
        match self.scene.weather {
            Weather::Clear => {}
            Weather::Fog => {
                let fog = match self.scene.time {
                    TimeOfDay::Day => [195.0, 198.0, 200.0],
                    TimeOfDay::Dusk => [175.0, 160.0, 160.0],
                    TimeOfDay::Night => [55.0, 58.0, 68.0],
                };
                let fog = self.jit(fog, 0.05);
                let density = self.u(0.45, 0.72);
                let phase = self.u(0.0, 6.3);
                self.c.map(|_, y, px| {
                    let y = y as f32 + 0.5;
                    let depth = if y < hz {
                        1.05
                    } else {
                        1.0 - 0.5 * (y - hz) / (h - hz)
                    };
                    let band = 1.0 + 0.15 * (y * 0.2 + phase).sin();
                    mix(px, fog, (density * depth * band).min(0.95))
                });
            }
            Weather::Rain => {
                let streak = if night {
                    [110.0, 115.0, 130.0]
                } else {
                    [195.0, 200.0, 212.0]
                };
                let slant = self.u(0.2, 0.45);
                for _ in 0..(w * h / 150.0 * self.u(0.6, 1.2)) as usize {
                    let (x, y, len) = (self.u(-10.0, w), self.u(-10.0, h), self.u(5.0, 12.0));
                    let dx = len * (slant + self.u(-0.05, 0.05));
                    let a = self.u(0.25, 0.45);
                    self.c.line((x, y), (x + dx, y + len), 1.0, streak, a);
                }
            }
            Weather::Snow => {
                let flake = if night {
                    [180.0, 185.0, 200.0]
                } else {
                    [248.0, 248.0, 252.0]
                };
                for _ in 0..(w * h / 120.0 * self.u(0.6, 1.3)) as usize {
                    let (x, y, r) = (self.u(0.0, w), self.u(0.0, h), self.u(0.8, 1.6));
                    let a = self.u(0.7, 1.0);
                    self.c.circle(x, y, r, flake, a);
                }
            }
        }
    }

    pub(super) fn finish(&mut self, finish: Finish) {
        let centre = self.u(1.0, 5.0);
        self.c.blur(centre);
        let fade = if finish.faded {
            self.u(0.25, 0.45)
        } else {
            0.0
        };
        let gain = [0; 3].map(|_| self.u(0.94, 1.06));
        let vignette = self.u(0.0, 0.3);
        let (w, h) = (self.c.w(), self.c.h());
        let amp = finish.noise;
        let rng = &mut *self.rng;
        self.c.map(|x, y, px| {
            let luma = 0.3 * px[0] + 0.59 * px[1] + 0.11 * px[2];
            let sepia = [luma * 1.07 + 10.0, luma * 0.95 + 5.0, luma * 0.8];
            let (dx, dy) = (x as f32 / w - 0.5, y as f32 / h - 0.5);
            let shade = 1.0 - vignette * (dx * dx + dy * dy) * 2.0;
            let grain = amp * (rng.random::<f32>() + rng.random::<f32>() - 1.0);
            let toned = mix(px, sepia, fade);
            [0, 1, 2].map(|c| {
                let chroma = amp * 0.4 * (rng.random::<f32>() - 0.5);
                toned[c] * gain[c] * shade + grain + chroma
            })
        });
    }
}
