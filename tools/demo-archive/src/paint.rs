//! Draws a scene. Every parameter leaves a visible trace (sky colour, overlay, foliage,
//! shapes), blurred by jitter, overlap and noise so the tags are learnable but not trivial.

use crate::raster::{mix, Canvas, Rgb};
use crate::scene::{Scene, Season, Subject, TimeOfDay, Weather};
use image::RgbImage;
use rand::Rng;

/// How the finished print looks, independent of what it shows.
#[derive(Debug, Clone, Copy)]
pub struct Finish {
    /// Per-pixel noise amplitude in 0–255 units (kept low for PNG so files stay small).
    pub noise: f32,
    /// Old prints: partly faded towards sepia.
    pub faded: bool,
}

pub fn paint(
    scene: &Scene,
    width: u32,
    height: u32,
    finish: Finish,
    rng: &mut impl Rng,
) -> RgbImage {
    let mut p = Painter::new(scene, width, height, rng);
    p.sky();
    p.hills();
    p.lower_ground();
    // Farther things first, nearer ones over them.
    let order = [
        Subject::Harbour,
        Subject::Cliffs,
        Subject::Bridge,
        Subject::Lighthouse,
        Subject::Boats,
        Subject::Orchard,
        Subject::Market,
        Subject::FestivalLights,
    ];
    if !scene.has(Subject::Orchard) {
        p.scattered_trees();
    }
    for s in order.into_iter().filter(|&s| scene.has(s)) {
        match s {
            Subject::Harbour => p.harbour(),
            Subject::Cliffs => p.cliffs(),
            Subject::Bridge => p.bridge(),
            Subject::Lighthouse => p.lighthouse(),
            Subject::Boats => p.boats(),
            Subject::Orchard => p.orchard(),
            Subject::Market => p.market(),
            _ => p.festival_lights(),
        }
    }
    p.weather();
    p.finish(finish);
    p.c.to_image()
}

struct Painter<'a, R: Rng> {
    c: Canvas,
    rng: &'a mut R,
    scene: &'a Scene,
    /// Light falling on painted (not glowing) surfaces.
    tint: Rgb,
    horizon: f32,
    /// Where water gives way to beach or land (the canvas height when the sea fills the foot).
    shore: f32,
    /// Top of the land band where stalls and trees stand.
    ground: f32,
    sky_low: Rgb,
    /// Where a lighthouse may stand on a cliff: (x from, x to, top y).
    cliff_top: Option<(f32, f32, f32)>,
}

const WHITE: Rgb = [245.0, 245.0, 242.0];
const DARK: Rgb = [35.0, 32.0, 30.0];
const WOOD: Rgb = [105.0, 75.0, 48.0];

impl<'a, R: Rng> Painter<'a, R> {
    fn new(scene: &'a Scene, width: u32, height: u32, rng: &'a mut R) -> Self {
        let c = Canvas::new(width, height);
        let h = c.h();
        let horizon = h * (0.30 + 0.22 * rng.random::<f32>());
        let land_subject = scene.has(Subject::Market) || scene.has(Subject::Orchard);
        let shore = if !scene.sea {
            horizon
        } else if land_subject || scene.has(Subject::Beach) || rng.random_bool(0.5) {
            h * (0.68 + 0.18 * rng.random::<f32>())
        } else {
            h
        };
        let ground = if scene.has(Subject::Beach) && land_subject {
            shore + (h - shore) * 0.35
        } else {
            shore
        };
        let k = 0.92 + 0.16 * rng.random::<f32>();
        let mut tint = match scene.time {
            TimeOfDay::Day => [k; 3],
            TimeOfDay::Dusk => [0.95 * k, 0.72 * k, 0.62 * k],
            TimeOfDay::Night => [0.22 * k, 0.25 * k, 0.40 * k],
        };
        if scene.weather == Weather::Rain {
            tint = tint.map(|t| t * 0.85);
        }
        Painter {
            c,
            rng,
            scene,
            tint,
            horizon,
            shore,
            ground,
            sky_low: [0.0; 3],
            cliff_top: None,
        }
    }

    fn u(&mut self, a: f32, b: f32) -> f32 {
        a + (b - a) * self.rng.random::<f32>()
    }

    /// Varies a colour's brightness and hue a little.
    fn jit(&mut self, col: Rgb, amount: f32) -> Rgb {
        let k = 1.0 + self.u(-amount, amount);
        let mut out = col;
        for v in &mut out {
            *v *= k * (1.0 + self.u(-amount, amount) * 0.5);
        }
        out
    }

    /// A slightly varied surface colour under this picture's light.
    fn lit_jit(&mut self, col: Rgb, amount: f32) -> Rgb {
        let col = self.jit(col, amount);
        self.lit(col)
    }

    /// A surface colour under this picture's light.
    fn lit(&self, col: Rgb) -> Rgb {
        [0, 1, 2].map(|i| col[i] * self.tint[i])
    }

    fn choose(&mut self, options: &[Rgb]) -> Rgb {
        let i = self.rng.random_range(0..options.len());
        self.jit(options[i], 0.08)
    }

    fn snowy(&self) -> bool {
        self.scene.weather == Weather::Snow
    }

    fn foliage(&mut self) -> Rgb {
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

    fn sky(&mut self) {
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

    /// Distant hills and a few small trees along the horizon: season is visible in every picture.
    fn hills(&mut self) {
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

    fn lower_ground(&mut self) {
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
    fn water(&mut self) -> (Rgb, Rgb) {
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

    /// A round-crowned tree; bare in winter, blossoming in spring, fruiting when `fruit`.
    fn tree(&mut self, x: f32, base: f32, size: f32, fruit: bool) {
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

    fn scattered_trees(&mut self) {
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

    fn cliffs(&mut self) {
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

    fn bridge(&mut self) {
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

    fn harbour(&mut self) {
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

    fn lighthouse(&mut self) {
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

    fn boats(&mut self) {
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

    fn orchard(&mut self) {
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

    fn market(&mut self) {
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

    fn festival_lights(&mut self) {
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

    fn weather(&mut self) {
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

    fn finish(&mut self, finish: Finish) {
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
