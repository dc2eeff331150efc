//! Seeded, stratified splits of labelled rows: k folds for cross-validation and a holdout for
//! certifying a threshold on rows the map was not fitted on.

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

/// Row indices per class, each class shuffled with its own stream of `seed`.
fn shuffled_by_class(labels: &[u32], classes: usize, seed: u64) -> Vec<Vec<usize>> {
    let mut by_class = vec![Vec::new(); classes];
    for (i, &y) in labels.iter().enumerate() {
        by_class[y as usize].push(i);
    }
    for (c, rows) in by_class.iter_mut().enumerate() {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        rng.set_stream(c as u64);
        rows.shuffle(&mut rng);
    }
    by_class
}

/// Fold number (0..folds) of every row: within each class, shuffled rows are dealt round-robin,
/// so every fold gets each class's share to within one row.
pub fn stratified_folds(labels: &[u32], classes: usize, folds: usize, seed: u64) -> Vec<usize> {
    let mut fold_of = vec![0usize; labels.len()];
    let mut next = 0usize;
    for rows in shuffled_by_class(labels, classes, seed) {
        for i in rows {
            fold_of[i] = next % folds;
            next += 1;
        }
    }
    fold_of
}

/// Splits rows into (fit, holdout) with `fraction` of each class (rounded) in the holdout; both
/// lists sorted.
pub fn stratified_holdout(
    labels: &[u32],
    classes: usize,
    fraction: f64,
    seed: u64,
) -> (Vec<usize>, Vec<usize>) {
    let (mut fit, mut hold) = (Vec::new(), Vec::new());
    for rows in shuffled_by_class(labels, classes, seed) {
        let take = (rows.len() as f64 * fraction).round() as usize;
        hold.extend_from_slice(&rows[..take]);
        fit.extend_from_slice(&rows[take..]);
    }
    fit.sort_unstable();
    hold.sort_unstable();
    (fit, hold)
}

/// The rows `idx` of a row-major matrix with `columns` values per row.
pub fn take_rows<T: Copy>(values: &[T], columns: usize, idx: &[usize]) -> Vec<T> {
    let mut out = Vec::with_capacity(idx.len() * columns);
    for &i in idx {
        out.extend_from_slice(&values[i * columns..(i + 1) * columns]);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn folds_are_stratified_balanced_and_seeded() {
        let labels: Vec<u32> = (0..103).map(|i| u32::from(i % 10 < 3)).collect();
        let f = stratified_folds(&labels, 2, 5, 7);
        for fold in 0..5 {
            let pos = (0..103).filter(|&i| f[i] == fold && labels[i] == 1).count();
            let all = f.iter().filter(|&&x| x == fold).count();
            assert!((6..=7).contains(&pos), "fold {fold}: {pos} positives");
            assert!((20..=21).contains(&all), "fold {fold}: {all} rows");
        }
        assert_eq!(f, stratified_folds(&labels, 2, 5, 7));
        assert_ne!(f, stratified_folds(&labels, 2, 5, 8));
    }

    #[test]
    fn holdout_takes_the_fraction_of_each_class() {
        let labels: Vec<u32> = (0..1000).map(|i| (i % 4) as u32).collect();
        let (fit, hold) = stratified_holdout(&labels, 4, 0.3, 1);
        assert_eq!(hold.len(), 300);
        assert_eq!(fit.len() + hold.len(), 1000);
        for c in 0..4 {
            assert_eq!(hold.iter().filter(|&&i| labels[i] == c).count(), 75);
        }
        let rows = take_rows(&[1, 2, 3, 4, 5, 6], 2, &[2, 0]);
        assert_eq!(rows, [5, 6, 1, 2]);
    }
}
