//! Small statistics: average ranks, Spearman's rank correlation, mean and
//! standard deviation.
//!
//! Spearman's rho is computed as Pearson's correlation of the average ranks
//! (tied values share the mean of the ranks they span). With ties this is
//! the exact definition; the shortcut `1 - 6 sum d^2 / (n (n^2 - 1))` is only
//! exact without ties, and the ground truth has ties (every channel that does
//! nothing has true effect 0).

/// 1-based ranks; tied values get the average of their ranks.
pub fn average_ranks(xs: &[f64]) -> Vec<f64> {
    let mut idx: Vec<usize> = (0..xs.len()).collect();
    idx.sort_by(|&a, &b| xs[a].total_cmp(&xs[b]));
    let mut ranks = vec![0.0; xs.len()];
    let mut i = 0;
    while i < idx.len() {
        let mut j = i;
        while j + 1 < idx.len() && xs[idx[j + 1]] == xs[idx[i]] {
            j += 1;
        }
        // Positions i..=j (0-based) hold ranks i+1..=j+1.
        let avg = (i + j) as f64 / 2.0 + 1.0;
        for &k in &idx[i..=j] {
            ranks[k] = avg;
        }
        i = j + 1;
    }
    ranks
}

/// Pearson's correlation; `None` when either side is constant or the
/// lengths differ or are below 2.
pub fn pearson(x: &[f64], y: &[f64]) -> Option<f64> {
    if x.len() != y.len() || x.len() < 2 {
        return None;
    }
    let n = x.len() as f64;
    let mx = x.iter().sum::<f64>() / n;
    let my = y.iter().sum::<f64>() / n;
    let (mut sxy, mut sxx, mut syy) = (0.0, 0.0, 0.0);
    for (a, b) in x.iter().zip(y) {
        sxy += (a - mx) * (b - my);
        sxx += (a - mx) * (a - mx);
        syy += (b - my) * (b - my);
    }
    if sxx == 0.0 || syy == 0.0 {
        return None;
    }
    Some(sxy / (sxx * syy).sqrt())
}

/// Spearman's rank correlation with average ranks for ties.
pub fn spearman(x: &[f64], y: &[f64]) -> Option<f64> {
    if x.len() != y.len() {
        return None;
    }
    pearson(&average_ranks(x), &average_ranks(y))
}

/// Mean and sample standard deviation (n - 1; 0 for fewer than 2 values).
pub fn mean_sd(xs: &[f64]) -> (f64, f64) {
    if xs.is_empty() {
        return (f64::NAN, f64::NAN);
    }
    let n = xs.len() as f64;
    let m = xs.iter().sum::<f64>() / n;
    if xs.len() < 2 {
        return (m, 0.0);
    }
    let v = xs.iter().map(|x| (x - m) * (x - m)).sum::<f64>() / (n - 1.0);
    (m, v.sqrt())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn spearman_without_ties_iq_and_television() {
        // The worked example of the Wikipedia article "Spearman's rank
        // correlation coefficient" (IQ against hours of television per week,
        // ten people): rho = -29/165 = -0.175757...; quoted from memory and
        // checked with scipy.stats.spearmanr (scipy 1.17.1), which gives
        // -0.17575757575757575.
        let iq = [106.0, 100.0, 86.0, 101.0, 99.0, 103.0, 97.0, 113.0, 112.0, 110.0];
        let tv = [7.0, 27.0, 2.0, 50.0, 28.0, 29.0, 20.0, 12.0, 6.0, 17.0];
        let rho = spearman(&iq, &tv).unwrap();
        assert!((rho - (-29.0 / 165.0)).abs() < 1e-12, "{rho}");
    }

    #[test]
    fn spearman_with_ties_matches_scipy() {
        // Values from scipy.stats.spearmanr and scipy.stats.rankdata
        // (scipy 1.17.1, installed with pip only to produce these numbers).
        let x = [1.0, 2.0, 2.0, 3.0, 5.0, 5.0, 5.0, 8.0];
        let y = [2.5, 1.0, 4.0, 4.0, 3.0, 7.0, 6.0, 6.0];
        assert_eq!(average_ranks(&x), vec![1.0, 2.5, 2.5, 4.0, 6.0, 6.0, 6.0, 8.0]);
        assert_eq!(average_ranks(&y), vec![2.0, 1.0, 4.5, 4.5, 3.0, 8.0, 6.5, 6.5]);
        let rho = spearman(&x, &y).unwrap();
        assert!((rho - 0.7144097497387378).abs() < 1e-12, "{rho}");

        // The shape of a ground-truth comparison: three channels tied at 0.
        let truth = [0.31, 0.12, 0.2, 0.0, 0.0, 0.0, 0.05];
        let shares = [0.25, 0.10, 0.30, 0.12, 0.11, 0.07, 0.05];
        assert_eq!(average_ranks(&truth), vec![7.0, 5.0, 6.0, 2.0, 2.0, 2.0, 4.0]);
        let rho = spearman(&truth, &shares).unwrap();
        assert!((rho - 0.48181205582971587).abs() < 1e-12, "{rho}");
    }

    #[test]
    fn spearman_edge_cases() {
        // A monotone transform keeps rho = 1; reversing gives -1; a constant
        // side has no correlation (definition of Pearson's r, common practice).
        let x = [1.0, 2.0, 3.0, 4.0];
        let y = [1.0, 8.0, 27.0, 64.0];
        assert!((spearman(&x, &y).unwrap() - 1.0).abs() < 1e-12);
        let r: Vec<f64> = y.iter().rev().copied().collect();
        assert!((spearman(&x, &r).unwrap() + 1.0).abs() < 1e-12);
        assert_eq!(spearman(&x, &[2.0; 4]), None);
        assert_eq!(spearman(&x, &[1.0, 2.0]), None);
    }

    #[test]
    fn mean_and_sample_sd() {
        // Sample standard deviation of 2, 4, 4, 4, 5, 5, 7, 9 is
        // sqrt(32 / 7) (population sd 2; the Wikipedia "Standard deviation"
        // example, from memory; arithmetic checked by hand).
        let (m, sd) = mean_sd(&[2.0, 4.0, 4.0, 4.0, 5.0, 5.0, 7.0, 9.0]);
        assert_eq!(m, 5.0);
        assert!((sd - (32.0f64 / 7.0).sqrt()).abs() < 1e-12);
    }
}
