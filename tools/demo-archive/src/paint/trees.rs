//! Trees and their foliage, whose colours carry the season.

use super::{Painter, WHITE, WOOD};
use crate::raster::Rgb;
use crate::scene::Season;
use rand::Rng;

impl<R: Rng> Painter<'_, R> {
    pub(super) fn foliage(&mut self) -> Rgb {
        let col = match self.scene.season {
            Season::Spring => [125.0, 190.0, 85.0],
            Season::Summer => [50.0, 122.0, 45.0],
            Season::Autumn => {
                let options = [
                    [205.0, 110.0, 40.0],
                    [180.0, 65.0, 35.0],
                    [210.0, 165.0, 50.0],
                ];
                options[self.rng.random_range(0..3)]
            }
            Season::Winter => [115.0, 100.0, 88.0],
        };
        self.jit(col, 0.1)
    }

    /// A round-crowned tree; bare in winter, blossoming in spring, fruiting when `fruit`.
    pub(super) fn tree(&mut self, x: f32, base: f32, size: f32, fruit: bool) {
        let trunk = self.lit_jit(WOOD, 0.1);
        let top = base - size * 0.55;
        self.c
            .rect(x - size * 0.08, top, x + size * 0.08, base, trunk, 1.0);
        let (cy, r) = (base - size * 0.8, size * 0.45);
        if self.scene.season == Season::Winter {
            for _ in 0..4 {
                let (dx, dy) = (self.u(-r, r), self.u(-r, r * 0.3));
                self.c.line(
                    (x, top),
                    (x + dx, cy + dy),
                    (size * 0.06).max(0.7),
                    trunk,
                    1.0,
                );
                if self.snowy() {
                    self.c.circle(x + dx, cy + dy, 0.9, WHITE, 0.9);
                }
            }
            return;
        }
        let leaf = self.foliage();
        self.c.circle(x, cy, r, self.lit(leaf), 1.0);
        let dots = match (self.scene.season, fruit) {
            (Season::Spring, _) => (size * 0.8) as usize,
            (_, true) => (size * 0.5) as usize,
            _ => 0,
        };
        for _ in 0..dots {
            let col = if self.scene.season == Season::Spring {
                self.choose(&[[250.0, 200.0, 215.0], [250.0, 250.0, 245.0]])
            } else {
                self.choose(&[[205.0, 30.0, 30.0], [230.0, 190.0, 40.0]])
            };
            let (a, d) = (self.u(0.0, 6.3), self.u(0.0, r * 0.85));
            self.c.circle(
                x + a.cos() * d,
                cy + a.sin() * d,
                (size * 0.06).max(0.8),
                self.lit(col),
                1.0,
            );
        }
    }

    pub(super) fn scattered_trees(&mut self) {
        let (w, h) = (self.c.w(), self.c.h());
        if self.ground >= h - 6.0 {
            return;
        }
        for _ in 0..self.rng.random_range(0..4) {
            let base = self.u(self.ground + 4.0, h);
            let size = 10.0 + 18.0 * (base - self.ground) / (h - self.ground);
            let x = self.u(0.0, w);
            self.tree(x, base, size, false);
        }
    }

    pub(super) fn orchard(&mut self) {
        let (w, h) = (self.c.w(), self.c.h());
        let rows = self.rng.random_range(2..4);
        for row in 0..rows {
            let t = (row + 1) as f32 / rows as f32;
            let base = self.ground + (h - self.ground) * (0.25 + 0.7 * t) + 2.0;
            let size = 10.0 + 22.0 * (base - self.ground) / (h - self.ground).max(1.0);
            let gap = size * self.u(0.9, 1.4);
            let mut x = self.u(0.0, gap);
            while x < w + size * 0.5 {
                self.tree(x, base, size, true);
                x += gap;
            }
        }
    }
}
