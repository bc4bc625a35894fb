//! Everything below the horizon that is not a subject: hills, water, beach, fields, cliffs.

use super::{Painter, DARK, WHITE};
use crate::raster::{mix, Rgb};
use crate::scene::{Season, Subject};
use rand::Rng;

impl<R: Rng> Painter<'_, R> {
    fn ground_colour(&mut self) -> Rgb {
        let col = if self.snowy() {
            [232.0, 235.0, 242.0]
        } else {
            match self.scene.season {
                Season::Spring => [105.0, 165.0, 75.0],
                Season::Summer => [85.0, 138.0, 55.0],
                Season::Autumn => [150.0, 115.0, 60.0],
                Season::Winter => [160.0, 156.0, 146.0],
            }
        };
        self.lit_jit(col, 0.08)
    }

    /// Distant hills and a few small trees along the horizon: season is visible in every picture.
    pub(super) fn hills(&mut self) {
        let (w, h, hz) = (self.c.w(), self.c.h(), self.horizon);
        for layer in 0..2 {
            let mut pts = vec![(0.0, hz + 1.0)];
            let mut x = 0.0;
            let amp = h * if layer == 0 { 0.12 } else { 0.06 };
            while x < w {
                pts.push((x, hz - self.u(0.0, amp)));
                x += self.u(8.0, 24.0);
            }
            pts.push((w, hz - self.u(0.0, amp)));
            pts.push((w, hz + 1.0));
            let veg = self.foliage();
            let far = if self.snowy() {
                [225.0, 228.0, 235.0]
            } else {
                veg
            };
            let col = mix(
                self.lit(far),
                self.sky_low,
                if layer == 0 { 0.55 } else { 0.3 },
            );
            self.c.polygon(&pts, col, 1.0);
        }
        for _ in 0..self.rng.random_range(2..7) {
            let x = self.u(0.0, w);
            let size = self.u(4.0, 8.0);
            self.tree(x, hz + 1.0, size, false);
        }
    }

    pub(super) fn lower_ground(&mut self) {
        let (w, h, hz) = (self.c.w(), self.c.h(), self.horizon);
        if self.scene.sea {
            let (far, near) = self.water();
            self.c.gradient(hz, self.shore, far, near);
            let ripple = mix(near, [255.0; 3], 0.35);
            for _ in 0..self.rng.random_range(20..60) {
                let (x, y) = (self.u(0.0, w), self.u(hz + 1.0, self.shore));
                let len = self.u(3.0, 12.0) * (0.4 + (y - hz) / (h - hz));
                self.c.line((x, y), (x + len, y), 1.0, ripple, 0.4);
            }
        }
        if self.scene.has(Subject::Beach) {
            let sand = if self.snowy() {
                [225.0, 225.0, 230.0]
            } else if self.scene.season == Season::Winter {
                [200.0, 192.0, 175.0]
            } else {
                [218.0, 196.0, 148.0]
            };
            let sand = self.lit_jit(sand, 0.06);
            let edge = self.wavy_edge(self.shore);
            let mut pts = edge.clone();
            pts.push((w, h));
            pts.push((0.0, h));
            self.c.polygon(&pts, sand, 1.0);
            for pair in edge.windows(2) {
                self.c.line(pair[0], pair[1], 1.5, self.lit(WHITE), 0.7);
            }
            for _ in 0..40 {
                let (x, y) = (self.u(0.0, w), self.u(self.shore + 2.0, h));
                let col = self.jit(mix(sand, DARK, 0.3), 0.2);
                self.c.circle(x, y, 0.9, col, 0.6);
            }
        }
        // A beach with nothing behind it runs to the foot of the picture.
        let beach_only = self.scene.has(Subject::Beach) && self.ground <= self.shore;
        if self.ground < h && !beach_only {
            let col = self.ground_colour();
            let edge = self.wavy_edge(self.ground);
            let mut pts = edge;
            pts.push((w, h));
            pts.push((0.0, h));
            self.c.polygon(&pts, col, 1.0);
            for _ in 0..((w * (h - self.ground)) / 40.0) as usize {
                let (x, y) = (self.u(0.0, w), self.u(self.ground + 1.0, h));
                let speck = if self.scene.season == Season::Autumn && !self.snowy() {
                    let leaf = self.foliage();
                    self.lit(leaf)
                } else {
                    self.jit(col, 0.2)
                };
                let r = self.u(0.8, 1.6);
                self.c.circle(x, y, r, speck, 0.8);
            }
        }
    }

    /// Water colours far and near: the sea's own colour under this light, reflecting the sky.
    pub(super) fn water(&mut self) -> (Rgb, Rgb) {
        let deep = self.lit_jit([28.0, 78.0, 105.0], 0.12);
        (mix(deep, self.sky_low, 0.55), mix(deep, self.sky_low, 0.25))
    }

    fn wavy_edge(&mut self, y: f32) -> Vec<(f32, f32)> {
        let w = self.c.w();
        let (amp, phase, freq) = (self.u(0.5, 2.5), self.u(0.0, 6.3), self.u(0.03, 0.09));
        (0..=16)
            .map(|i| {
                let x = w * i as f32 / 16.0;
                (x, y + amp * (x * freq + phase).sin())
            })
            .collect()
    }

    pub(super) fn cliffs(&mut self) {
        let (w, h) = (self.c.w(), self.c.h());
        let left = self.rng.random_bool(0.5);
        let cw = w * self.u(0.25, 0.45);
        let top = (self.horizon - h * self.u(0.03, 0.18)).max(h * 0.28);
        let inner = cw * self.u(0.65, 0.8);
        // Built for a left-hand cliff, mirrored for the right.
        let mut pts = vec![(0.0, h), (0.0, top)];
        pts.push((inner * 0.5, top + self.u(-2.0, 2.0)));
        pts.push((inner, top + self.u(0.0, 3.0)));
        let steps = self.rng.random_range(4..7);
        for i in 1..=steps {
            let t = i as f32 / steps as f32;
            let x = inner + (cw - inner) * t + self.u(-3.0, 3.0);
            pts.push((x, top + (h - top) * t));
        }
        let flip = |x: f32| if left { x } else { w - x };
        let pts: Vec<(f32, f32)> = pts.into_iter().map(|(x, y)| (flip(x), y)).collect();
        let rock = self.choose(&[
            [125.0, 110.0, 95.0],
            [150.0, 140.0, 125.0],
            [150.0, 100.0, 75.0],
        ]);
        self.c.polygon(&pts, self.lit(rock), 1.0);
        let seam = self.lit(mix(rock, DARK, 0.35));
        for _ in 0..((cw * (h - top)) / 25.0) as usize {
            let (x, y) = (self.u(0.0, inner), self.u(top + 3.0, h));
            let grit = self.lit_jit(rock, 0.25);
            let r = self.u(0.8, 2.0);
            self.c.circle(flip(x), y, r, grit, 0.7);
        }
        for _ in 0..self.rng.random_range(3..7) {
            let y = self.u(top + 4.0, h);
            let len = inner * self.u(0.3, 0.9);
            let tilt = self.u(-2.0, 2.0);
            self.c
                .line((flip(0.0), y), (flip(len), y + tilt), 1.0, seam, 0.8);
        }
        let cap = if self.snowy() { WHITE } else { self.foliage() };
        let cap = self.lit(cap);
        let (a, b) = (flip(0.0), flip(inner));
        self.c
            .rect(a.min(b), top - 2.0, a.max(b), top + 2.0, cap, 1.0);
        self.cliff_top = Some((
            flip(inner * 0.15).min(flip(inner * 0.75)),
            flip(inner * 0.15).max(flip(inner * 0.75)),
            top,
        ));
    }
}
