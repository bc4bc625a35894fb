//! The small bright foreground subjects: market stalls and strings of festival lights.

use super::{Painter, DARK, WHITE, WOOD};
use crate::raster::mix;
use crate::scene::TimeOfDay;
use rand::Rng;

impl<R: Rng> Painter<'_, R> {
    pub(super) fn market(&mut self) {
        let (w, h) = (self.c.w(), self.c.h());
        let base = self.ground + (h - self.ground) * self.u(0.6, 0.95);
        let sw = w * self.u(0.1, 0.16);
        let mut x = self.u(-sw * 0.5, w * 0.3);
        let last = x + (sw + 3.0) * self.rng.random_range(3..7) as f32;
        let tone = [WHITE, [240.0, 228.0, 190.0]];
        while x < last.min(w) {
            let stripe = self.choose(&[
                [200.0, 40.0, 40.0],
                [40.0, 80.0, 180.0],
                [40.0, 140.0, 70.0],
                [230.0, 190.0, 40.0],
                [230.0, 120.0, 30.0],
                [120.0, 50.0, 140.0],
            ]);
            let plain = tone[self.rng.random_range(0..2)];
            let (top, ah) = (base - sw * 1.15, sw * 0.35);
            let post = self.lit(DARK);
            self.c.line((x + 1.0, top), (x + 1.0, base), 1.0, post, 1.0);
            self.c
                .line((x + sw - 1.0, top), (x + sw - 1.0, base), 1.0, post, 1.0);
            let n = self.rng.random_range(5..8);
            let sw_n = sw / n as f32;
            for i in 0..n {
                let col = self.lit(if i % 2 == 0 { stripe } else { plain });
                let sx = x + i as f32 * sw_n;
                self.c.rect(sx, top, sx + sw_n, top + ah, col, 1.0);
                self.c
                    .circle(sx + sw_n / 2.0, top + ah, sw_n / 2.0, col, 1.0);
            }
            let wood = self.lit_jit(WOOD, 0.1);
            self.c.rect(x, base - sw * 0.35, x + sw, base, wood, 1.0);
            for _ in 0..self.rng.random_range(4..10) {
                let goods = self.choose(&[
                    [230.0, 130.0, 30.0],
                    [200.0, 30.0, 30.0],
                    [90.0, 160.0, 50.0],
                    [235.0, 210.0, 60.0],
                ]);
                let gx = self.u(x + 2.0, x + sw - 2.0);
                let r = self.u(1.2, 2.0);
                self.c.circle(gx, base - sw * 0.37, r, self.lit(goods), 1.0);
            }
            x += sw + self.u(1.0, 5.0);
        }
    }

    pub(super) fn festival_lights(&mut self) {
        let (w, h) = (self.c.w(), self.c.h());
        let glowing = self.scene.time != TimeOfDay::Day;
        for _ in 0..self.rng.random_range(2..5) {
            let (x0, x1) = (self.u(-5.0, w * 0.2), self.u(w * 0.8, w + 5.0));
            let (y0, y1) = (h * self.u(0.05, 0.5), h * self.u(0.05, 0.5));
            let sag = self.u(6.0, 25.0);
            let at = |t: f32| {
                (
                    x0 + (x1 - x0) * t,
                    y0 + (y1 - y0) * t + sag * 4.0 * t * (1.0 - t),
                )
            };
            for i in 0..20 {
                let (a, b) = (at(i as f32 / 20.0), at((i + 1) as f32 / 20.0));
                self.c.line(a, b, 0.8, [30.0, 28.0, 26.0], 0.9);
            }
            let step = self.u(5.0, 8.0) / (x1 - x0);
            let r = self.u(1.3, 2.0);
            let mut t = self.u(0.0, step);
            while t < 1.0 {
                let (bx, by) = at(t);
                let bulb = self.choose(&[
                    [255.0, 60.0, 60.0],
                    [255.0, 220.0, 60.0],
                    [80.0, 255.0, 100.0],
                    [80.0, 160.0, 255.0],
                    [255.0, 120.0, 220.0],
                    [255.0, 255.0, 255.0],
                ]);
                if glowing {
                    self.c.circle(bx, by + r, r * 2.8, bulb, 0.3);
                    self.c.circle(bx, by + r, r, bulb, 1.0);
                } else {
                    self.c
                        .circle(bx, by + r, r, mix(bulb, [150.0; 3], 0.3), 1.0);
                }
                t += step;
            }
        }
    }
}
