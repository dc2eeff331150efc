//! Orders of the items by confidence, as the metrics need them. Each is a sort of
//! (key, index) pairs held side by side in memory — no indirect look-ups while sorting — whose
//! keys are all distinct, so an unstable sort gives the one defined order (about 3x faster on
//! a million items than a stable sort of indices comparing `conf[a]` with `conf[b]`).

use std::cmp::Reverse;

/// A key whose integer order is `f64::total_cmp`'s order (the same bit transform it uses).
#[inline]
fn total_key(x: f64) -> i64 {
    let bits = x.to_bits() as i64;
    bits ^ (((bits >> 63) as u64) >> 1) as i64
}

/// Indices by confidence descending; ties keep input order (the stable descending order).
pub(crate) fn descending_order(conf: &[f64]) -> Vec<usize> {
    let mut keyed: Vec<(Reverse<i64>, usize)> = conf
        .iter()
        .enumerate()
        .map(|(i, &c)| (Reverse(total_key(c)), i))
        .collect();
    keyed.sort_unstable();
    keyed.into_iter().map(|(_, i)| i).collect()
}

/// Indices by confidence ascending; ties keep input order (the stable ascending order).
pub(crate) fn ascending_order(conf: &[f64]) -> Vec<usize> {
    let mut keyed: Vec<(i64, usize)> = conf
        .iter()
        .enumerate()
        .map(|(i, &c)| (total_key(c), i))
        .collect();
    keyed.sort_unstable();
    keyed.into_iter().map(|(_, i)| i).collect()
}

/// Indices by confidence ascending, ties by index descending (the exact reverse of
/// [`descending_order`]), and the confidences in that order.
pub(crate) fn sweep_order(conf: &[f64]) -> (Vec<usize>, Vec<f64>) {
    let mut keyed: Vec<(i64, Reverse<usize>)> = conf
        .iter()
        .enumerate()
        .map(|(i, &c)| (total_key(c), Reverse(i)))
        .collect();
    keyed.sort_unstable();
    // The key transform is its own inverse.
    let sorted = keyed
        .iter()
        .map(|&(k, _)| f64::from_bits(total_key_inverse(k)))
        .collect();
    (keyed.into_iter().map(|(_, Reverse(i))| i).collect(), sorted)
}

/// The bits of the value whose [`total_key`] is `key`.
#[inline]
fn total_key_inverse(key: i64) -> u64 {
    (key ^ (((key >> 63) as u64) >> 1) as i64) as u64
}

/// The stable descending and ascending orders from the sweep order and its runs of equal
/// confidence ([start, end) positions): the first is its reverse, the second is it with each
/// run reversed back to input order.
pub(crate) fn stable_orders(sweep: &[usize], runs: &[(usize, usize)]) -> (Vec<usize>, Vec<usize>) {
    let descending = sweep.iter().rev().copied().collect();
    let mut ascending = sweep.to_vec();
    for &(start, end) in runs {
        ascending[start..end].reverse();
    }
    (descending, ascending)
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    proptest! {
        #[test]
        fn orders_equal_the_stable_sorts(
            conf in proptest::collection::vec(
                prop_oneof![-1.0f64..2.0, Just(0.0), Just(-0.0), Just(0.5), Just(1.0)],
                0..60,
            ),
        ) {
            let mut want: Vec<usize> = (0..conf.len()).collect();
            want.sort_by(|&a, &b| conf[a].total_cmp(&conf[b]));
            prop_assert_eq!(ascending_order(&conf), want.clone());
            want.sort_by(|&a, &b| conf[b].total_cmp(&conf[a]));
            prop_assert_eq!(descending_order(&conf), want.clone());
            want.reverse();
            let (order, sorted) = sweep_order(&conf);
            prop_assert_eq!(&order, &want);
            let gathered: Vec<u64> = want.iter().map(|&i| conf[i].to_bits()).collect();
            prop_assert_eq!(sorted.iter().map(|c| c.to_bits()).collect::<Vec<_>>(), gathered);
            let mut runs = Vec::new();
            let mut start = 0;
            for j in 1..=order.len() {
                if j == order.len() || sorted[j].to_bits() != sorted[start].to_bits() {
                    runs.push((start, j));
                    start = j;
                }
            }
            let (descending, ascending) = stable_orders(&order, &runs);
            prop_assert_eq!(descending, descending_order(&conf));
            prop_assert_eq!(ascending, ascending_order(&conf));
        }
    }
}
