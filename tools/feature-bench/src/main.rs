//! Measures tagweave's image features: how fast (against a bare full-size decode) and how
//! useful for tag transfer (leave-one-out kNN on the shared evaluation folders).
//!
//!   feature-bench speed   [--folder DIR] [--count 40] [--table]
//!   feature-bench quality [--eval DIR] [--dump DIR]
//!
//! Feature settings (working size, atoms, stride…) can be overridden on both.

mod quality;
mod speed;

use clap::{Args, Parser, Subcommand};
use tagweave_vision::{Activation, FeatureOptions};

#[derive(Parser)]
#[command(about = "Speed and quality figures for tagweave's image features")]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Pictures per second: bare full-size decode vs tagweave decode (+ features).
    Speed(speed::SpeedArgs),
    /// Leave-one-out kNN tag transfer (LRAP) on the evaluation folders.
    Quality(quality::QualityArgs),
}

/// Overrides on top of the library's default feature options.
#[derive(Args, Clone, Debug)]
pub struct FeatureArgs {
    /// Working-image long side in pixels.
    #[arg(long)]
    long_side: Option<u32>,
    /// Dictionary atoms K.
    #[arg(long)]
    atoms: Option<usize>,
    /// Dense-grid stride.
    #[arg(long)]
    stride: Option<usize>,
    /// Patch side.
    #[arg(long)]
    patch: Option<usize>,
    /// Activation: "soft" (soft threshold) or "triangle".
    #[arg(long)]
    activation: Option<String>,
    /// Soft-threshold alpha.
    #[arg(long)]
    alpha: Option<f32>,
    #[arg(long)]
    contrast_eps: Option<f32>,
    #[arg(long)]
    zca_eps: Option<f32>,
    #[arg(long)]
    samples_per_image: Option<usize>,
    /// Patch pooling grids, e.g. "1,2".
    #[arg(long)]
    pool_grids: Option<String>,
    #[arg(long)]
    l_bins: Option<usize>,
    #[arg(long)]
    ab_bins: Option<usize>,
    #[arg(long)]
    ab_range: Option<f32>,
    /// Colour histogram grids, e.g. "1,2" ("" for none).
    #[arg(long)]
    hist_grids: Option<String>,
    /// Colour moment grids, e.g. "4" ("" for none).
    #[arg(long)]
    moment_grids: Option<String>,
    #[arg(long)]
    learn_images: Option<usize>,
    #[arg(long, default_value_t = 1)]
    seed: u64,
}

impl FeatureArgs {
    fn options(&self) -> anyhow::Result<FeatureOptions> {
        let mut o = FeatureOptions::default();
        let p = &mut o.patches;
        let c = &mut o.colour;
        macro_rules! set {
            ($($field:ident => $target:expr),* $(,)?) => {
                $(if let Some(v) = self.$field.clone() { $target = v; })*
            };
        }
        set!(long_side => o.decode.long_side, atoms => p.atoms, stride => p.stride,
             patch => p.size, contrast_eps => p.contrast_eps, zca_eps => p.zca_eps,
             samples_per_image => p.samples_per_image, l_bins => c.l_bins,
             ab_bins => c.ab_bins, ab_range => c.ab_range, learn_images => o.learn_images);
        for (arg, target) in [
            (&self.pool_grids, &mut p.pool_grids),
            (&self.hist_grids, &mut c.histogram_grids),
            (&self.moment_grids, &mut c.moment_grids),
        ] {
            if let Some(text) = arg {
                *target = parse_grids(text)?;
            }
        }
        let alpha = self.alpha.unwrap_or(0.25);
        match self.activation.as_deref() {
            None => {
                if let Activation::SoftThreshold { alpha: a } = &mut p.activation {
                    *a = self.alpha.unwrap_or(*a);
                }
            }
            Some("soft") => p.activation = Activation::SoftThreshold { alpha },
            Some("triangle") => p.activation = Activation::Triangle,
            Some(other) => anyhow::bail!("unknown activation {other:?}: use soft or triangle"),
        }
        Ok(o)
    }
}

/// "1,2" → [1, 2]; "" → none.
fn parse_grids(text: &str) -> anyhow::Result<Vec<usize>> {
    text.split(',')
        .map(str::trim)
        .filter(|t| !t.is_empty())
        .map(|t| {
            t.parse()
                .map_err(|e| anyhow::anyhow!("grid size {t:?}: {e}"))
        })
        .collect()
}

fn main() -> anyhow::Result<()> {
    match Cli::parse().command {
        Command::Speed(args) => speed::run(&args),
        Command::Quality(args) => quality::run(&args),
    }
}
