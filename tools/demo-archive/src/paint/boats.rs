//! Boats on the water, smaller and higher the farther off they lie.

use super::{Painter, DARK, WHITE};
use crate::raster::mix;
use crate::scene::TimeOfDay;
use rand::Rng;

impl<R: Rng> Painter<'_, R> {
    pub(super) fn boats(&mut self) {
        let (w, h, hz) = (self.c.w(), self.c.h(), self.horizon);
        let foot = self.shore.min(h);
        let mut ys: Vec<f32> = (0..self.rng.random_range(1..5))
            .map(|_| self.u(hz + 4.0, foot - 2.0))
            .collect();
        ys.sort_by(f32::total_cmp);
        for y in ys {
            let scale = 0.5 + (y - hz) / (h - hz);
            let len = w * 0.12 * scale * self.u(0.8, 1.4);
            let depth = len * self.u(0.18, 0.26);
            let x = self.u(len * 0.3, w - len * 0.3);
            let hull = self.choose(&[
                [180.0, 40.0, 35.0],
                [35.0, 50.0, 100.0],
                [235.0, 235.0, 228.0],
                [40.0, 110.0, 60.0],
                [30.0, 30.0, 32.0],
                [220.0, 180.0, 40.0],
            ]);
            let (l, r) = (x - len / 2.0, x + len / 2.0);
            self.c.polygon(
                &[
                    (l, y - depth),
                    (r, y - depth),
                    (r - len * 0.15, y),
                    (l + len * 0.2, y),
                ],
                self.lit(hull),
                1.0,
            );
            self.c.polygon(
                &[
                    (l + len * 0.2, y),
                    (r - len * 0.15, y),
                    (r - len * 0.2, y + depth * 0.8),
                    (l + len * 0.25, y + depth * 0.8),
                ],
                self.lit(hull),
                0.25,
            );
            let trim = self.lit(mix(hull, WHITE, 0.6));
            self.c.line((l, y - depth), (r, y - depth), 1.0, trim, 1.0);
            if self.rng.random_bool(0.4) {
                let cab = self.lit_jit(WHITE, 0.1);
                self.c.rect(
                    x - len * 0.25,
                    y - depth - len * 0.18,
                    x + len * 0.05,
                    y - depth,
                    cab,
                    1.0,
                );
            }
            let mast_h = len * self.u(0.8, 1.3);
            let top = y - depth - mast_h;
            self.c
                .line((x, y - depth), (x, top), 1.0, self.lit(DARK), 1.0);
            if self.rng.random_bool(0.6) {
                let sail = self.lit_jit([238.0, 228.0, 205.0], 0.06);
                self.c.polygon(
                    &[
                        (x + 1.0, top + 1.0),
                        (x + 1.0, y - depth - 2.0),
                        (x + len * 0.42, y - depth - 2.0),
                    ],
                    sail,
                    1.0,
                );
            }
            if self.scene.time == TimeOfDay::Night && self.rng.random_bool(0.5) {
                self.c.circle(x, top, 1.2, [255.0, 230.0, 150.0], 1.0);
            }
        }
    }
}
