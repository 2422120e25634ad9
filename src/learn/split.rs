//! Splitting labeled examples: the out-of-time holdout and stratified k-fold assignment.

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

/// Number of holdout rows for `n` rows: the latest `fraction`, rounded up.
pub fn holdout_len(n: usize, fraction: f64) -> usize {
    ((n as f64 * fraction).ceil() as usize).min(n)
}

/// Assigns each row to one of `k` folds so each fold holds (as nearly as possible) the same
/// share of each class. Rows of a class are shuffled with a seeded ChaCha8 generator, then dealt
/// round-robin; the assignment is reproducible for the same labels and seed.
pub fn stratified_folds(labels: &[u8], k: usize, seed: u64) -> Vec<usize> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut fold = vec![0; labels.len()];
    let mut offset = 0;
    for class in [0u8, 1u8] {
        let mut members: Vec<usize> = (0..labels.len()).filter(|&i| labels[i] == class).collect();
        members.shuffle(&mut rng);
        for (position, &i) in members.iter().enumerate() {
            fold[i] = (offset + position) % k;
        }
        // Continue the deal where the last class stopped, so fold sizes differ by at most one.
        offset = (offset + members.len()) % k;
    }
    fold
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn holdout_takes_the_latest_share_rounded_up() {
        assert_eq!(holdout_len(100, 0.25), 25);
        assert_eq!(holdout_len(101, 0.25), 26);
        assert_eq!(holdout_len(3, 0.9), 3);
    }

    #[test]
    fn folds_are_stratified_balanced_and_reproducible() {
        let labels: Vec<u8> = (0..103).map(|i| u8::from(i % 4 == 0)).collect(); // 26 positives
        let folds = stratified_folds(&labels, 5, 7);
        assert_eq!(folds, stratified_folds(&labels, 5, 7));
        assert_ne!(folds, stratified_folds(&labels, 5, 8));
        for f in 0..5 {
            let size = folds.iter().filter(|&&x| x == f).count();
            let pos = (0..labels.len())
                .filter(|&i| folds[i] == f && labels[i] == 1)
                .count();
            assert!((20..=21).contains(&size), "fold {f} has {size} rows");
            assert!((5..=6).contains(&pos), "fold {f} has {pos} positives");
        }
    }
}
