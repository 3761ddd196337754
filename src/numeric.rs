//! Small numeric helpers that more than one layer needs: the Mann–Whitney AUROC.

/// AUROC of `positives` against `negatives`: the Mann–Whitney `U` of the positives divided by
/// `n_pos * n_neg`, with tied values given their average rank (so a tie counts one half).
/// Sorting makes it O(n log n). `None` when a side is empty or a value is NaN.
pub fn auroc(positives: &[f64], negatives: &[f64]) -> Option<f64> {
    let (n1, n0) = (positives.len(), negatives.len());
    if n1 == 0 || n0 == 0 || positives.iter().chain(negatives).any(|v| v.is_nan()) {
        return None;
    }
    let mut all: Vec<(f64, bool)> = positives
        .iter()
        .map(|&v| (v, true))
        .chain(negatives.iter().map(|&v| (v, false)))
        .collect();
    all.sort_by(|a, b| a.0.total_cmp(&b.0));
    // Sum of the (1-based, tie-averaged) ranks of the positives.
    let mut rank_sum = 0.0f64;
    let mut i = 0;
    while i < all.len() {
        let mut j = i + 1;
        // -0.0 and 0.0 are one value here, as for any comparison of scores.
        while j < all.len() && all[j].0 == all[i].0 {
            j += 1;
        }
        let avg_rank = (i + 1 + j) as f64 / 2.0; // mean of ranks i+1 ..= j
        let pos_in_group = all[i..j].iter().filter(|e| e.1).count();
        rank_sum += avg_rank * pos_in_group as f64;
        i = j;
    }
    let (n1f, n0f) = (n1 as f64, n0 as f64);
    let u = rank_sum - n1f * (n1f + 1.0) / 2.0;
    Some(u / (n1f * n0f))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn auroc_closed_form_small() {
        // Pairs (p, n): 3>1, 3>2, 3=3 (1/2), 5>1, 5>2, 5>3 -> U = 5.5 of 6.
        let a = auroc(&[3.0, 5.0], &[1.0, 2.0, 3.0]).unwrap();
        assert_eq!(a, 5.5 / 6.0);
        assert_eq!(auroc(&[], &[1.0]), None);
        assert_eq!(auroc(&[1.0, 1.0], &[1.0]), Some(0.5));
    }
}
