//! The bins of a visual predictive check: the levels grouped by their binning time (time, or
//! time after the dose), automatically by the data's sampling clusters or by given edges
//! (docs/methods.md, section 12.6).
//!
//! **Automatic bins** (a rule of our own, derived here). The binning times are sorted; a level
//! starts a new cluster when its gap `g` to the previous one exceeds the smaller of 15 % of its
//! own time and 5 % of the whole span, and at least 0.5 % of the span:
//! `g > max(0.005·span, min(0.15·t, 0.05·span))`. The relative part separates the close
//! early samples of a geometric schedule (0.5, 1, 2 h), the part of the span the evenly spaced
//! late ones (144, 156, 168 h), and the floor keeps a cluster near 0 whole. Then, while some
//! cluster has fewer than [`MIN_LEVELS`] levels, the smallest (the earliest among equals)
//! joins the neighbour across the smaller gap (the earlier on a tie).

/// The fewest levels an automatic bin holds (unless the study has fewer).
pub const MIN_LEVELS: usize = 10;
/// The most bins, automatic or given: bounds the replicates' memory.
pub const MAX_BINS: usize = 100;

const GAP_OF_TIME: f64 = 0.15;
const GAP_OF_SPAN: f64 = 0.05;
const GAP_FLOOR: f64 = 0.005;

/// The ranges of the clusters of `times` (any order), each `[first, last]`, in time order;
/// none for no times.
pub fn automatic(times: &[f64]) -> Vec<[f64; 2]> {
    let mut sorted = times.to_vec();
    sorted.sort_by(f64::total_cmp);
    let (Some(&first), Some(&last)) = (sorted.first(), sorted.last()) else {
        return Vec::new();
    };
    let span = last - first;
    // Clusters as index ranges into `sorted`, [start, end).
    let mut clusters: Vec<(usize, usize)> = Vec::new();
    let mut start = 0;
    for i in 1..sorted.len() {
        let (a, b) = (sorted[i - 1], sorted[i]);
        let threshold = (GAP_FLOOR * span).max((GAP_OF_TIME * b.abs()).min(GAP_OF_SPAN * span));
        if b - a > threshold {
            clusters.push((start, i));
            start = i;
        }
    }
    clusters.push((start, sorted.len()));
    let gap = |left: (usize, usize), right: (usize, usize)| sorted[right.0] - sorted[left.1 - 1];
    while clusters.len() > 1 {
        let size = |c: &(usize, usize)| c.1 - c.0;
        let Some(small) = (0..clusters.len())
            .filter(|&i| size(&clusters[i]) < MIN_LEVELS)
            .min_by_key(|&i| (size(&clusters[i]), i))
        else {
            break;
        };
        let left = small.checked_sub(1).map(|l| (l, gap(clusters[l], clusters[small])));
        let right =
            (small + 1 < clusters.len()).then(|| (small + 1, gap(clusters[small], clusters[small + 1])));
        let other = match (left, right) {
            (Some(l), Some(r)) => {
                if r.1 < l.1 {
                    r.0
                } else {
                    l.0
                }
            }
            (Some(l), None) => l.0,
            (None, Some(r)) => r.0,
            (None, None) => break,
        };
        let (a, b) = (small.min(other), small.max(other));
        clusters[a] = (clusters[a].0, clusters[b].1);
        clusters.remove(b);
    }
    clusters.iter().map(|&(s, e)| [sorted[s], sorted[e - 1]]).collect()
}

/// The bin of time `t` among given `edges` (strictly increasing, at least two): bin j holds
/// `[edges[j], edges[j+1])`, the last also its upper edge; `None` outside.
pub fn by_edges(edges: &[f64], t: f64) -> Option<usize> {
    let last = *edges.last()?;
    if t < edges[0] || t > last {
        return None;
    }
    Some(edges.partition_point(|&e| e <= t).saturating_sub(1).min(edges.len() - 2))
}

/// The bin of time `t` among automatic `ranges` (from [`automatic`] on the same times).
pub fn by_ranges(ranges: &[[f64; 2]], t: f64) -> Option<usize> {
    ranges.iter().position(|r| t >= r[0] && t <= r[1])
}

/// Check given edges: finite, strictly increasing, at least two, at most [`MAX_BINS`] bins.
pub fn check_edges(edges: &[f64]) -> Result<(), String> {
    if edges.len() < 2 {
        return Err(format!("expected at least two bin edges, found {}", edges.len()));
    }
    if edges.len() - 1 > MAX_BINS {
        return Err(format!("at most {MAX_BINS} bins, found {} edges", edges.len()));
    }
    if let Some(w) = edges.windows(2).find(|w| w[1] <= w[0]) {
        return Err(format!("the bin edges must increase: {} is followed by {}", w[0], w[1]));
    }
    Ok(())
}

#[cfg(test)]
#[allow(clippy::float_cmp)] // the ranges are data values
mod tests {
    use super::*;

    /// `count` levels around each nominal time, spread evenly over ±`spread` of it.
    fn design(nominal: &[f64], count: usize, spread: f64) -> Vec<f64> {
        nominal
            .iter()
            .flat_map(|&t| {
                (0..count).map(move |i| t * (1.0 - spread + 2.0 * spread * i as f64 / (count - 1) as f64))
            })
            .collect()
    }

    #[test]
    fn a_geometric_schedule_gives_one_bin_per_nominal_time() {
        let nominal = [0.25, 0.5, 1.0, 2.0, 4.0, 8.0, 12.0, 24.0];
        let ranges = automatic(&design(&nominal, 20, 0.05));
        assert_eq!(ranges.len(), nominal.len());
        for (r, t) in ranges.iter().zip(nominal) {
            assert!(r[0] <= t && t <= r[1], "{r:?} holds {t}");
        }
    }

    #[test]
    fn evenly_spaced_late_samples_stay_apart() {
        let nominal: Vec<f64> = (0..=14).map(|i| 12.0 * f64::from(i)).collect();
        let times: Vec<f64> =
            nominal.iter().flat_map(|&t| (0..12).map(move |i| t + 0.5 * f64::from(i) / 11.0)).collect();
        assert_eq!(automatic(&times).len(), nominal.len());
    }

    #[test]
    fn small_clusters_join_the_nearer_neighbour() {
        // 10 at 1 h, 3 at 2 h, 10 at 8 h: the three join the cluster at 1 h.
        let mut times = vec![1.0; 10];
        times.extend([2.0; 3]);
        times.extend([8.0; 10]);
        assert_eq!(automatic(&times), vec![[1.0, 2.0], [8.0, 8.0]]);
        // Fewer levels than a bin holds: one bin.
        assert_eq!(automatic(&[1.0, 5.0, 9.0]), vec![[1.0, 9.0]]);
        assert!(automatic(&[]).is_empty());
    }

    #[test]
    fn edges_close_each_bin_on_the_left_and_the_last_on_both_sides() {
        let edges = [0.0, 2.0, 6.0, 24.0];
        assert_eq!(by_edges(&edges, 0.0), Some(0));
        assert_eq!(by_edges(&edges, 2.0), Some(1));
        assert_eq!(by_edges(&edges, 5.9), Some(1));
        assert_eq!(by_edges(&edges, 24.0), Some(2));
        assert_eq!(by_edges(&edges, 24.1), None);
        assert_eq!(by_edges(&edges, -0.1), None);
        assert!(check_edges(&[0.0, 2.0, 2.0]).is_err());
        assert!(check_edges(&[3.0]).is_err());
        assert!(check_edges(&edges).is_ok());
    }
}
