//! A tiny floating-point canvas: enough shapes to draw a town's pictures, blended in linear
//! 0–255 units so fog, tints and noise can be applied after drawing.

use image::RgbImage;

/// An RGB colour in 0–255 units, kept as floats so blends do not band.
pub type Rgb = [f32; 3];

pub struct Canvas {
    pub width: u32,
    pub height: u32,
    px: Vec<Rgb>,
}

impl Canvas {
    pub fn new(width: u32, height: u32) -> Self {
        Canvas {
            width,
            height,
            px: vec![[0.0; 3]; (width * height) as usize],
        }
    }

    pub fn w(&self) -> f32 {
        self.width as f32
    }

    pub fn h(&self) -> f32 {
        self.height as f32
    }

    /// Mixes `col` into one pixel with opacity `alpha`; outside the canvas is ignored.
    pub fn blend(&mut self, x: i64, y: i64, col: Rgb, alpha: f32) {
        if x < 0 || y < 0 || x >= self.width as i64 || y >= self.height as i64 {
            return;
        }
        let p = &mut self.px[(y as u64 * self.width as u64 + x as u64) as usize];
        for c in 0..3 {
            p[c] += (col[c] - p[c]) * alpha;
        }
    }

    /// Fills a horizontal run of pixels whose centres lie in `[x0, x1)` on row `y`.
    fn span(&mut self, y: i64, x0: f32, x1: f32, col: Rgb, alpha: f32) {
        let a = (x0 - 0.5).ceil().max(0.0) as i64;
        let b = (x1 - 0.5).ceil().min(self.w()) as i64;
        for x in a..b {
            self.blend(x, y, col, alpha);
        }
    }

    /// Rows whose pixel centres lie in `[y0, y1)`, clipped to the canvas.
    fn rows(&self, y0: f32, y1: f32) -> std::ops::Range<i64> {
        let a = (y0 - 0.5).ceil().max(0.0) as i64;
        let b = (y1 - 0.5).ceil().min(self.h()) as i64;
        a..b.max(a)
    }

    pub fn rect(&mut self, x0: f32, y0: f32, x1: f32, y1: f32, col: Rgb, alpha: f32) {
        for y in self.rows(y0, y1) {
            self.span(y, x0, x1, col, alpha);
        }
    }

    /// Vertical gradient from `top` (at `y0`) to `bottom` (at `y1`) across the full width.
    pub fn gradient(&mut self, y0: f32, y1: f32, top: Rgb, bottom: Rgb) {
        for y in self.rows(y0, y1) {
            let t = ((y as f32 + 0.5 - y0) / (y1 - y0).max(1.0)).clamp(0.0, 1.0);
            let col = mix(top, bottom, t);
            self.span(y, 0.0, self.w(), col, 1.0);
        }
    }

    pub fn ellipse(&mut self, cx: f32, cy: f32, rx: f32, ry: f32, col: Rgb, alpha: f32) {
        if rx <= 0.0 || ry <= 0.0 {
            return;
        }
        for y in self.rows(cy - ry, cy + ry) {
            let dy = (y as f32 + 0.5 - cy) / ry;
            let half = rx * (1.0 - dy * dy).max(0.0).sqrt();
            self.span(y, cx - half, cx + half, col, alpha);
        }
    }

    pub fn circle(&mut self, cx: f32, cy: f32, r: f32, col: Rgb, alpha: f32) {
        self.ellipse(cx, cy, r, r, col, alpha);
    }

    /// Even-odd scanline fill of a closed polygon.
    pub fn polygon(&mut self, pts: &[(f32, f32)], col: Rgb, alpha: f32) {
        self.rings(&[pts], col, alpha);
    }

    /// Even-odd scanline fill of several closed outlines at once, so an inner outline cuts
    /// a hole (the openings under a bridge).
    pub fn rings(&mut self, rings: &[&[(f32, f32)]], col: Rgb, alpha: f32) {
        let edges: Vec<((f32, f32), (f32, f32))> = rings
            .iter()
            .filter(|r| r.len() >= 3)
            .flat_map(|r| (0..r.len()).map(move |i| (r[i], r[(i + 1) % r.len()])))
            .collect();
        let (lo, hi) = edges.iter().fold((f32::MAX, f32::MIN), |(lo, hi), e| {
            (lo.min(e.0 .1), hi.max(e.0 .1))
        });
        let mut xs = Vec::new();
        for y in self.rows(lo, hi) {
            let yc = y as f32 + 0.5;
            xs.clear();
            for &((ax, ay), (bx, by)) in &edges {
                if (ay <= yc) != (by <= yc) {
                    xs.push(ax + (yc - ay) / (by - ay) * (bx - ax));
                }
            }
            xs.sort_by(f32::total_cmp);
            for pair in xs.chunks_exact(2) {
                self.span(y, pair[0], pair[1], col, alpha);
            }
        }
    }

    /// A straight stroke of the given width, drawn as a quadrilateral.
    pub fn line(&mut self, a: (f32, f32), b: (f32, f32), width: f32, col: Rgb, alpha: f32) {
        let (dx, dy) = (b.0 - a.0, b.1 - a.1);
        let len = (dx * dx + dy * dy).sqrt().max(1e-3);
        let (nx, ny) = (-dy / len * width / 2.0, dx / len * width / 2.0);
        self.polygon(
            &[
                (a.0 + nx, a.1 + ny),
                (b.0 + nx, b.1 + ny),
                (b.0 - nx, b.1 - ny),
                (a.0 - nx, a.1 - ny),
            ],
            col,
            alpha,
        );
    }

    /// Rewrites every pixel through `f(x, y, colour)`.
    pub fn map(&mut self, mut f: impl FnMut(u32, u32, Rgb) -> Rgb) {
        for (i, p) in self.px.iter_mut().enumerate() {
            let i = i as u32;
            *p = f(i % self.width, i / self.width, *p);
        }
    }

    /// 3×3 blur with centre weight `centre` (1 = plain box blur); softens the hard edges.
    pub fn blur(&mut self, centre: f32) {
        let (w, h) = (self.width as i64, self.height as i64);
        let src = self.px.clone();
        for y in 0..h {
            for x in 0..w {
                let mut acc = [0.0f32; 3];
                let mut weight = 0.0;
                for (dx, dy) in (-1..=1).flat_map(|dy| (-1..=1).map(move |dx| (dx, dy))) {
                    let (sx, sy) = (x + dx, y + dy);
                    if sx < 0 || sy < 0 || sx >= w || sy >= h {
                        continue;
                    }
                    let k = if dx == 0 && dy == 0 { centre } else { 1.0 };
                    let s = src[(sy * w + sx) as usize];
                    for c in 0..3 {
                        acc[c] += s[c] * k;
                    }
                    weight += k;
                }
                self.px[(y * w + x) as usize] = acc.map(|v| v / weight);
            }
        }
    }

    pub fn to_image(&self) -> RgbImage {
        let mut img = RgbImage::new(self.width, self.height);
        for (dst, src) in img.pixels_mut().zip(&self.px) {
            dst.0 = src.map(|v| v.round().clamp(0.0, 255.0) as u8);
        }
        img
    }
}

/// Linear interpolation between two colours (`t` = 0 gives `a`).
pub fn mix(a: Rgb, b: Rgb, t: f32) -> Rgb {
    [0, 1, 2].map(|c| a[c] + (b[c] - a[c]) * t)
}

#[cfg(test)]
mod tests {
    use super::*;

    const WHITE: Rgb = [255.0; 3];

    fn painted(c: &Canvas) -> usize {
        c.px.iter().filter(|p| p[0] > 127.0).count()
    }

    #[test]
    fn rect_and_square_polygon_cover_the_same_pixels() {
        let mut a = Canvas::new(20, 20);
        a.rect(2.0, 3.0, 12.0, 9.0, WHITE, 1.0);
        let mut b = Canvas::new(20, 20);
        b.polygon(
            &[(2.0, 3.0), (12.0, 3.0), (12.0, 9.0), (2.0, 9.0)],
            WHITE,
            1.0,
        );
        assert_eq!(painted(&a), 60);
        assert_eq!(a.px, b.px);
    }

    #[test]
    fn circle_area_is_close_to_pi_r_squared() {
        // source: area of a disc, π r² (elementary geometry); pixel-centre sampling of r = 20
        // should land within 1 % of 1256.6.
        let mut c = Canvas::new(64, 64);
        c.circle(32.0, 32.0, 20.0, WHITE, 1.0);
        let area = painted(&c) as f32;
        assert!((area - 1256.6).abs() < 12.6, "area {area}");
    }

    #[test]
    fn triangle_covers_half_its_box_and_clips_at_edges() {
        let mut c = Canvas::new(40, 40);
        c.polygon(&[(0.0, 0.0), (40.0, 0.0), (0.0, 40.0)], WHITE, 1.0);
        // Half of 1600 pixels, give or take the diagonal.
        assert!((painted(&c) as i64 - 800).abs() <= 40, "{}", painted(&c));
        let mut d = Canvas::new(10, 10);
        d.rect(-50.0, -50.0, 50.0, 50.0, WHITE, 1.0);
        assert_eq!(painted(&d), 100);
    }

    #[test]
    fn inner_ring_cuts_a_hole() {
        let mut c = Canvas::new(10, 10);
        let outer = [(0.0, 0.0), (10.0, 0.0), (10.0, 10.0), (0.0, 10.0)];
        let inner = [(2.0, 2.0), (6.0, 2.0), (6.0, 6.0), (2.0, 6.0)];
        c.rings(&[&outer, &inner], WHITE, 1.0);
        assert_eq!(painted(&c), 100 - 16);
    }

    #[test]
    fn blur_keeps_a_flat_image_flat_and_softens_a_dot() {
        let mut c = Canvas::new(5, 5);
        c.rect(0.0, 0.0, 5.0, 5.0, [100.0; 3], 1.0);
        c.blend(2, 2, WHITE, 1.0);
        c.blur(1.0);
        let centre = c.px[12][0];
        assert!((centre - (100.0 + 155.0 / 9.0)).abs() < 1e-3, "{centre}");
        assert!((c.px[0][0] - 100.0).abs() < 1e-3);
    }
}
