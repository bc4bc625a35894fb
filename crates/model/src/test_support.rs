//! Shared fixtures for the tests of several modules.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::rbm::standard_normal;
use crate::BinaryRbm;

/// Weights N(0, std²), biases N(0, 0.3²): a model with some structure to check against.
pub(crate) fn random_binary_rbm(nv: usize, nh: usize, std: f32, seed: u64) -> BinaryRbm {
    let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0x5eed);
    let mut rbm = BinaryRbm::new(nv, nh, std, seed);
    rbm.visible_bias
        .mapv_inplace(|_| 0.3 * standard_normal(&mut rng));
    rbm.hidden_bias
        .mapv_inplace(|_| 0.3 * standard_normal(&mut rng));
    rbm
}
