//! The product's feature vector: colour statistics followed by pooled patch codes.

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use crate::{
    load_working_image, ColourOptions, DecodeOptions, PatchDictionary, PatchOptions, ProgressFn,
    VisionError, WorkingImage,
};

/// A variant of a picture that keeps what it shows (and so its tags).
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Variant {
    /// Flipped left to right.
    Mirrored,
    /// The centre share of each side, enlarged back to the working size.
    CentreCrop(f32),
}

/// The variants [`FeatureExtractor::training_variants`] describes: a mirror and a 90 % centre
/// crop, both of which keep a photo's tags (a prototype on the shared sets measured
/// +0.03 LRAP on photographic cut-outs from these two as extra training rows).
pub const TRAINING_VARIANTS: [Variant; 2] = [Variant::Mirrored, Variant::CentreCrop(0.9)];

/// Everything that decides the feature vector.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct FeatureOptions {
    pub decode: DecodeOptions,
    pub colour: ColourOptions,
    pub patches: PatchOptions,
    /// At most this many pictures (a seeded random subset) are decoded to learn from.
    pub learn_images: usize,
}

impl Default for FeatureOptions {
    fn default() -> Self {
        Self {
            decode: DecodeOptions::default(),
            colour: ColourOptions::default(),
            patches: PatchOptions::default(),
            learn_images: 400,
        }
    }
}

/// Turns pictures into fixed-length vectors; learned once per collection and kept by the
/// store so every later picture is described the same way.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct FeatureExtractor {
    decode: DecodeOptions,
    colour: ColourOptions,
    dictionary: PatchDictionary,
}

impl FeatureExtractor {
    /// Decodes a seeded subset of `paths` (in parallel) and learns the patch dictionary
    /// from it. Pictures that fail to decode are left out of learning; only when none
    /// decodes is it an error. Progress counts decoded pictures, then k-means iterations.
    pub fn learn(
        paths: &[PathBuf],
        opts: &FeatureOptions,
        seed: u64,
        progress: ProgressFn,
    ) -> Result<Self, VisionError> {
        let mut chosen: Vec<usize> = if paths.len() > opts.learn_images {
            let mut rng = ChaCha8Rng::seed_from_u64(seed);
            rand::seq::index::sample(&mut rng, paths.len(), opts.learn_images).into_vec()
        } else {
            (0..paths.len()).collect()
        };
        chosen.sort_unstable();
        let total = chosen.len() + opts.patches.iterations;
        let done = AtomicUsize::new(0);
        let decoded: Vec<Result<WorkingImage, VisionError>> = chosen
            .par_iter()
            .map(|&i| {
                let result = load_working_image(&paths[i], &opts.decode);
                progress(done.fetch_add(1, Ordering::Relaxed) + 1, total);
                result
            })
            .collect();
        let mut first_error = None;
        let mut samples = Vec::with_capacity(decoded.len());
        for result in decoded {
            match result {
                Ok(img) => samples.push(img),
                Err(e) => {
                    first_error.get_or_insert(e);
                }
            }
        }
        if samples.is_empty() {
            return Err(VisionError::NotEnoughData(match first_error {
                Some(e) => format!(
                    "none of the {} pictures tried could be read; first: {e}",
                    chosen.len()
                ),
                None => "no pictures given".to_string(),
            }));
        }
        let offset = chosen.len();
        Self::learn_from_images(&samples, opts, seed, &|i, _| progress(offset + i, total))
    }

    /// Learns from pictures already decoded with `opts.decode`.
    pub fn learn_from_images(
        samples: &[WorkingImage],
        opts: &FeatureOptions,
        seed: u64,
        progress: ProgressFn,
    ) -> Result<Self, VisionError> {
        opts.colour
            .validate()
            .map_err(VisionError::InvalidOptions)?;
        let dictionary = PatchDictionary::learn(samples, &opts.patches, seed, progress)?;
        Ok(Self {
            decode: opts.decode.clone(),
            colour: opts.colour.clone(),
            dictionary,
        })
    }

    pub fn decode_options(&self) -> &DecodeOptions {
        &self.decode
    }

    /// Length of every feature vector.
    pub fn dimension(&self) -> usize {
        self.colour_dimension() + self.dictionary.dimension()
    }

    /// The first `colour_dimension()` values are colour, the rest patch codes.
    pub fn colour_dimension(&self) -> usize {
        self.colour.dimension()
    }

    pub fn dictionary(&self) -> &PatchDictionary {
        &self.dictionary
    }

    /// Decodes `path` at working size and describes it.
    pub fn features(&self, path: &Path) -> Result<Vec<f32>, VisionError> {
        Ok(self.features_of(&load_working_image(path, &self.decode)?))
    }

    /// Feature vectors of the picture's training variants, in [`TRAINING_VARIANTS`] order:
    /// decoded once, each variant described like a picture. Variants of a photo keep its tags,
    /// so they serve as extra training examples.
    pub fn training_variants(&self, path: &Path) -> Result<Vec<Vec<f32>>, VisionError> {
        self.training_variants_of(&load_working_image(path, &self.decode)?)
    }

    /// [`Self::training_variants`] of a picture already at working size.
    pub fn training_variants_of(&self, img: &WorkingImage) -> Result<Vec<Vec<f32>>, VisionError> {
        TRAINING_VARIANTS
            .iter()
            .map(|variant| {
                Ok(match variant {
                    Variant::Mirrored => self.features_of(&img.mirrored()),
                    Variant::CentreCrop(fraction) => self.features_of(&img.centre_crop(*fraction)?),
                })
            })
            .collect()
    }

    /// Describes a picture already at working size.
    pub fn features_of(&self, img: &WorkingImage) -> Vec<f32> {
        let mut out = Vec::with_capacity(self.dimension());
        self.colour.features(img, &mut out);
        self.dictionary.encode(img, &mut out);
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::patches::tests::synthetic_pictures;

    fn opts() -> FeatureOptions {
        FeatureOptions {
            patches: PatchOptions {
                atoms: 16,
                pool_grids: vec![1, 2],
                samples_per_image: 100,
                iterations: 8,
                ..PatchOptions::default()
            },
            ..FeatureOptions::default()
        }
    }

    fn write_pictures(dir: &Path, pictures: &[WorkingImage]) -> Vec<PathBuf> {
        pictures
            .iter()
            .enumerate()
            .map(|(i, p)| {
                let path = dir.join(format!("p{i}.png"));
                image::RgbImage::from_raw(p.width(), p.height(), p.rgb().to_vec())
                    .unwrap()
                    .save(&path)
                    .unwrap();
                path
            })
            .collect()
    }

    fn all_feature_bytes(paths: &[PathBuf], seed: u64, threads: usize) -> Vec<u8> {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap();
        pool.install(|| {
            let fx = FeatureExtractor::learn(paths, &opts(), seed, &|_, _| {}).unwrap();
            let rows: Vec<Vec<f32>> = paths.par_iter().map(|p| fx.features(p).unwrap()).collect();
            rows.iter()
                .flatten()
                .flat_map(|v| v.to_le_bytes())
                .collect()
        })
    }

    #[test]
    fn deterministic_for_seed_and_thread_count() {
        let dir = tempfile::tempdir().unwrap();
        let paths = write_pictures(dir.path(), &synthetic_pictures(10, 3));
        let one = all_feature_bytes(&paths, 11, 1);
        let two = all_feature_bytes(&paths, 11, 2);
        assert_eq!(one, two);
        assert_eq!(one, all_feature_bytes(&paths, 11, 2));
        assert_ne!(
            one,
            all_feature_bytes(&paths, 12, 2),
            "the seed should matter"
        );
    }

    #[test]
    fn learn_skips_bad_files_and_survives_serde() {
        let dir = tempfile::tempdir().unwrap();
        let mut paths = write_pictures(dir.path(), &synthetic_pictures(10, 3));
        let bad = dir.path().join("bad.jpg");
        std::fs::write(&bad, b"\xFF\xD8\xFFnot really").unwrap();
        paths.push(bad.clone());
        let calls = AtomicUsize::new(0);
        let fx = FeatureExtractor::learn(&paths, &opts(), 1, &|_, _| {
            calls.fetch_add(1, Ordering::Relaxed);
        })
        .unwrap();
        assert!(calls.load(Ordering::Relaxed) >= paths.len());
        let features = fx.features(&paths[0]).unwrap();
        assert_eq!(features.len(), fx.dimension());
        assert_eq!(fx.dimension(), fx.colour_dimension() + 5 * 16);
        let err = fx.features(&bad).unwrap_err();
        assert!(err.to_string().contains("bad.jpg"), "{err}");
        let json = serde_json::to_string(&fx).unwrap();
        let back: FeatureExtractor = serde_json::from_str(&json).unwrap();
        assert_eq!(back.features(&paths[0]).unwrap(), features);
    }

    #[test]
    fn learn_with_only_unreadable_files_is_a_clear_error() {
        let dir = tempfile::tempdir().unwrap();
        let bad = dir.path().join("broken.png");
        std::fs::write(&bad, b"nothing").unwrap();
        let err = FeatureExtractor::learn(&[bad], &opts(), 1, &|_, _| {}).unwrap_err();
        assert!(err.to_string().contains("broken.png"), "{err}");
    }

    #[test]
    fn training_variants_describe_the_mirror_and_the_crop() {
        let dir = tempfile::tempdir().unwrap();
        let pictures = synthetic_pictures(10, 3);
        let paths = write_pictures(dir.path(), &pictures);
        let fx = FeatureExtractor::learn(&paths, &opts(), 1, &|_, _| {}).unwrap();
        let img = load_working_image(&paths[2], fx.decode_options()).unwrap();
        let variants = fx.training_variants(&paths[2]).unwrap();
        assert_eq!(variants.len(), TRAINING_VARIANTS.len());
        assert_eq!(variants[0], fx.features_of(&img.mirrored()));
        assert_eq!(variants[1], fx.features_of(&img.centre_crop(0.9).unwrap()));
        let original = fx.features(&paths[2]).unwrap();
        for variant in &variants {
            assert_eq!(variant.len(), fx.dimension());
            assert_ne!(variant, &original);
        }
        let bad = dir.path().join("bad.png");
        std::fs::write(&bad, b"nothing").unwrap();
        assert!(fx.training_variants(&bad).is_err());
    }

    // The colour layout of a mirror is the original's, mirrored: with a 4×4 moment
    // grid over a picture whose width divides by 4, cell (row, col) of the mirror
    // has the statistics of cell (row, 3 − col) of the original.
    #[test]
    fn mirror_has_the_mirrored_colour_layout() {
        let pictures = synthetic_pictures(10, 3);
        let only_moments = FeatureOptions {
            colour: ColourOptions {
                l_bins: 0,
                histogram_grids: vec![],
                moment_grids: vec![4],
                ..ColourOptions::default()
            },
            ..opts()
        };
        let fx =
            FeatureExtractor::learn_from_images(&pictures, &only_moments, 1, &|_, _| {}).unwrap();
        // left half dark red, right half light blue, a yellow block top left
        let (w, h) = (32u32, 16u32);
        let rgb = (0..w * h)
            .flat_map(|i| match (i % w, i / w) {
                (x, y) if x < 8 && y < 4 => [230, 220, 20],
                (x, _) if x < 16 => [120, 10, 10],
                _ => [150, 190, 250],
            })
            .collect();
        let img = WorkingImage::from_rgb8(w, h, rgb).unwrap();
        assert_eq!(fx.colour_dimension(), 16 * 6);
        let cells = |f: Vec<f32>| -> Vec<Vec<f32>> {
            f[..fx.colour_dimension()]
                .chunks_exact(6)
                .map(<[f32]>::to_vec)
                .collect()
        };
        let original = cells(fx.features_of(&img));
        let mirrored = cells(fx.features_of(&img.mirrored()));
        assert_ne!(original, mirrored);
        for row in 0..4 {
            for col in 0..4 {
                let (a, b) = (&mirrored[row * 4 + col], &original[row * 4 + 3 - col]);
                assert!(
                    a.iter().zip(b).all(|(x, y)| (x - y).abs() < 1e-4),
                    "cell ({row}, {col}): {a:?} vs {b:?}"
                );
            }
        }
    }

    #[test]
    fn odd_pictures_give_features_of_full_length() {
        let pictures = synthetic_pictures(10, 3);
        let fx = FeatureExtractor::learn_from_images(&pictures, &opts(), 1, &|_, _| {}).unwrap();
        for img in [
            WorkingImage::from_rgb8(1, 1, vec![0, 0, 0]).unwrap(),
            WorkingImage::from_rgb8(160, 2, vec![200; 960]).unwrap(),
        ] {
            let f = fx.features_of(&img);
            assert_eq!(f.len(), fx.dimension());
            assert!(f.iter().all(|v| v.is_finite()));
        }
    }
}
