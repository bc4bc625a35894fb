//! Draws a scene. Every parameter leaves a visible trace (sky colour, overlay, foliage,
//! shapes), blurred by jitter, overlap and noise so the tags are learnable but not trivial.
//! One file per kind of thing painted; this one holds the order of painting and the shared tools.

mod boats;
mod land;
mod market;
mod overlay;
mod sky;
mod structures;
mod trees;

use crate::raster::{Canvas, Rgb};
use crate::scene::{Scene, Subject, TimeOfDay, Weather};
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
}
