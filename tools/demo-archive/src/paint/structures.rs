//! Built subjects that stand still: bridge, harbour quay and pier, lighthouse.

use super::{Painter, DARK, WHITE, WOOD};
use crate::raster::mix;
use crate::scene::TimeOfDay;
use rand::Rng;

impl<R: Rng> Painter<'_, R> {
    pub(super) fn bridge(&mut self) {
        let (w, h, hz) = (self.c.w(), self.c.h(), self.horizon);
        let span = w * self.u(0.45, 0.9);
        let xa = self.u(-0.1 * w, w - span * 0.9);
        let xb = xa + span;
        let base = if self.scene.sea {
            hz + (self.shore.min(h) - hz) * self.u(0.3, 0.8)
        } else {
            hz + (h - hz) * self.u(0.2, 0.5)
        };
        if !self.scene.sea {
            // Without the sea, the bridge crosses a river.
            let (far, near) = self.water();
            let depth = self.u(4.0, 9.0);
            self.c.gradient(base - 1.0, base + depth, far, near);
        }
        let arches = self.rng.random_range(1..4);
        let each = span / arches as f32;
        let rise = each * self.u(0.3, 0.5);
        let deck = self.u(3.0, 5.0);
        let top = base - rise - deck;
        if self.rng.random_bool(0.6) {
            // Masonry: a wall with arched openings cut out.
            let stone = self.choose(&[
                [150.0, 140.0, 125.0],
                [150.0, 85.0, 60.0],
                [175.0, 165.0, 140.0],
            ]);
            let outer = [(xa, top), (xb, top), (xb, base + 2.0), (xa, base + 2.0)];
            let pier = self.u(2.0, 5.0);
            let holes: Vec<Vec<(f32, f32)>> = (0..arches)
                .map(|i| {
                    let (x0, x1) = (
                        xa + each * i as f32 + pier,
                        xa + each * (i + 1) as f32 - pier,
                    );
                    arc(x0, x1, base + 2.0, rise - 1.0)
                })
                .collect();
            let mut rings: Vec<&[(f32, f32)]> = vec![&outer];
            rings.extend(holes.iter().map(|v| v.as_slice()));
            self.c.rings(&rings, self.lit(stone), 1.0);
            let coping = self.lit(mix(stone, DARK, 0.4));
            self.c.rect(xa, top - 1.5, xb, top + 0.5, coping, 1.0);
        } else {
            // Iron: a deck on a single arched rib with struts.
            let iron = self.choose(&[[150.0, 60.0, 40.0], [70.0, 85.0, 80.0]]);
            let iron = self.lit(iron);
            let rise = span * self.u(0.2, 0.3);
            let deck_y = base - rise;
            let outer = arc(xa, xb, base, rise);
            let mut band = arc(xa + 3.0, xb - 3.0, base, rise - 3.0);
            band.reverse();
            let mut pts = outer;
            pts.extend(band);
            self.c.polygon(&pts, iron, 1.0);
            self.c
                .rect(xa - 4.0, deck_y - deck, xb + 4.0, deck_y, iron, 1.0);
            let n = self.rng.random_range(5..10);
            for i in 1..n {
                let x = xa + span * i as f32 / n as f32;
                let t = 2.0 * (x - xa) / span - 1.0;
                let y = base - rise * (1.0 - t * t).max(0.0).sqrt();
                self.c.line((x, deck_y), (x, y), 1.0, iron, 1.0);
            }
        }
    }

    pub(super) fn harbour(&mut self) {
        let (w, h, hz) = (self.c.w(), self.c.h(), self.horizon);
        // Sheds on the far quay, windows lit after dark.
        let mut x = self.u(-10.0, w * 0.5);
        let end = x + w * self.u(0.3, 0.6);
        while x < end {
            let (bw, bh) = (self.u(10.0, 22.0), self.u(6.0, 14.0));
            let wall = self.choose(&[
                [160.0, 70.0, 55.0],
                [200.0, 170.0, 90.0],
                [150.0, 150.0, 150.0],
                [225.0, 220.0, 205.0],
            ]);
            self.c
                .rect(x, hz - bh, x + bw, hz + 2.0, self.lit(wall), 1.0);
            let roof = self.lit(mix(wall, DARK, 0.5));
            self.c.polygon(
                &[
                    (x - 1.0, hz - bh),
                    (x + bw / 2.0, hz - bh - bw * 0.3),
                    (x + bw + 1.0, hz - bh),
                ],
                roof,
                1.0,
            );
            let glow = self.scene.time != TimeOfDay::Day;
            for k in 0..((bw / 6.0) as usize) {
                let wx = x + 2.0 + k as f32 * 6.0;
                let col = if glow && self.rng.random_bool(0.6) {
                    [255.0, 215.0, 120.0]
                } else {
                    self.lit(DARK)
                };
                self.c
                    .rect(wx, hz - bh + 2.0, wx + 2.5, hz - bh + 5.0, col, 1.0);
            }
            x += bw + self.u(0.0, 4.0);
        }
        // A pier reaching out from one side.
        let water_foot = self.shore.min(h);
        let y = hz + (water_foot - hz) * self.u(0.35, 0.7);
        let len = w * self.u(0.3, 0.65);
        let (x0, x1) = if self.rng.random_bool(0.5) {
            (-2.0, len)
        } else {
            (w - len, w + 2.0)
        };
        let scale = 0.6 + (y - hz) / (h - hz);
        let thick = 2.5 * scale + 1.0;
        let wood = self.lit_jit(WOOD, 0.12);
        let post = self.lit(mix(WOOD, DARK, 0.5));
        let mut px = x0 + 3.0;
        while px < x1 {
            self.c
                .rect(px, y, px + 1.5 * scale, y + thick + 6.0 * scale, post, 1.0);
            px += self.u(7.0, 12.0) * scale;
        }
        self.c.rect(x0, y - thick, x1, y, wood, 1.0);
        for _ in 0..self.rng.random_range(1..4) {
            let bx = self.u(x0.max(0.0), x1.min(w));
            self.c.rect(
                bx,
                y - thick - 2.0 * scale,
                bx + 1.5 * scale,
                y - thick,
                self.lit(DARK),
                1.0,
            );
        }
        if self.shore < h {
            let stone = self.lit_jit([130.0, 128.0, 120.0], 0.08);
            self.c
                .rect(0.0, self.shore - 3.0, w, self.shore + 1.0, stone, 1.0);
        }
    }

    pub(super) fn lighthouse(&mut self) {
        let (w, h, hz) = (self.c.w(), self.c.h(), self.horizon);
        let (x, base) = match self.cliff_top {
            Some((a, b, top)) => (self.u(a, b), top + 1.0),
            None if self.scene.sea => {
                let x = self.u(0.15, 0.85) * w;
                let y = hz + self.u(3.0, (self.shore.min(h) - hz) * 0.5 + 4.0);
                let rock = self.lit_jit([95.0, 88.0, 80.0], 0.1);
                let (rx, ry) = (self.u(8.0, 16.0), self.u(2.0, 4.0));
                self.c.ellipse(x, y + 1.0, rx, ry, rock, 1.0);
                (x, y)
            }
            None => (self.u(0.15, 0.85) * w, hz + (h - hz) * self.u(0.1, 0.35)),
        };
        let height = (h * self.u(0.3, 0.5)).min(base - 8.0).max(10.0);
        let bw = height * self.u(0.09, 0.13);
        let tw = bw * 0.65;
        let (a, b) = match self.rng.random_range(0..3) {
            0 => ([190.0, 40.0, 35.0], WHITE),
            1 => ([40.0, 40.0, 45.0], WHITE),
            _ => (WHITE, [225.0, 220.0, 205.0]),
        };
        let bands = self.rng.random_range(4..7);
        let tower_top = base - height * 0.82;
        for i in 0..bands {
            let (t0, t1) = (i as f32 / bands as f32, (i + 1) as f32 / bands as f32);
            let (y0, y1) = (
                base - (base - tower_top) * t0,
                base - (base - tower_top) * t1,
            );
            let (w0, w1) = (bw + (tw - bw) * t0, bw + (tw - bw) * t1);
            let col = if i % 2 == 0 { a } else { b };
            self.c.polygon(
                &[(x - w0, y0), (x + w0, y0), (x + w1, y1), (x - w1, y1)],
                self.lit(col),
                1.0,
            );
        }
        self.c.rect(
            x - bw * 0.25,
            base - bw * 1.2,
            x + bw * 0.25,
            base,
            self.lit(DARK),
            1.0,
        );
        let gallery = tower_top - 2.0;
        self.c.rect(
            x - tw * 1.5,
            gallery,
            x + tw * 1.5,
            tower_top,
            self.lit(DARK),
            1.0,
        );
        let lamp_top = gallery - height * 0.1;
        let shining = self.scene.time != TimeOfDay::Day;
        let glass = if shining {
            [255.0, 242.0, 170.0]
        } else {
            self.lit([195.0, 205.0, 210.0])
        };
        self.c
            .rect(x - tw * 1.1, lamp_top, x + tw * 1.1, gallery, glass, 1.0);
        let cap = self.lit([120.0, 30.0, 30.0]);
        self.c.polygon(
            &[
                (x - tw * 1.4, lamp_top),
                (x + tw * 1.4, lamp_top),
                (x, lamp_top - tw * 1.3),
            ],
            cap,
            1.0,
        );
        if shining {
            let ly = (lamp_top + gallery) / 2.0;
            let strength = if self.scene.time == TimeOfDay::Night {
                1.0
            } else {
                0.6
            };
            self.c
                .circle(x, ly, height * 0.16, [255.0, 235.0, 150.0], 0.35 * strength);
            let dir = if self.rng.random_bool(0.5) { 1.0 } else { -1.0 };
            let reach = w * self.u(0.4, 0.8) * dir;
            let spread = self.u(6.0, 14.0);
            self.c.polygon(
                &[
                    (x, ly - 1.0),
                    (x + reach, ly - spread),
                    (x + reach, ly + spread),
                    (x, ly + 1.0),
                ],
                [255.0, 240.0, 170.0],
                0.22 * strength,
            );
        }
    }
}

/// Outline of an arch opening: from (x0, base) up over a half-ellipse to (x1, base).
fn arc(x0: f32, x1: f32, base: f32, rise: f32) -> Vec<(f32, f32)> {
    let (cx, rx) = ((x0 + x1) / 2.0, (x1 - x0) / 2.0);
    (0..=16)
        .map(|i| {
            let a = std::f32::consts::PI * (1.0 - i as f32 / 16.0);
            (cx + rx * a.cos(), base - rise * a.sin())
        })
        .collect()
}
