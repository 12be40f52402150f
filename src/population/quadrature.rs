//! Gauss–Hermite quadrature: ∫ g(x)·e^(−x²) dx ≈ Σᵢ wᵢ·g(xᵢ), exact when g is a polynomial of
//! degree below 2n. Nodes and weights by the Golub–Welsch algorithm (Golub GH, Welsch JH.
//! Calculation of Gauss quadrature rules. Math Comp 1969;23:221–230; recalled, not checked
//! against a bibliographic record): the nodes are the eigenvalues of the symmetric tridiagonal
//! Jacobi matrix of the Hermite polynomials (off-diagonal √(k/2)), and each weight is √π times
//! the square of the first component of its normalised eigenvector.

use nalgebra::{DMatrix, SymmetricEigen};
use std::sync::OnceLock;

/// A one-dimensional rule, nodes ascending.
#[derive(Debug, Clone, PartialEq)]
pub struct Rule {
    /// The nodes xᵢ.
    pub nodes: Vec<f64>,
    /// ln wᵢ (weights span many orders of magnitude in the tails).
    pub ln_weights: Vec<f64>,
}

/// The most nodes per dimension a rule may have. A posterior bent by a level near its
/// quantification limit can need 20 or more for −2 ln L to 1e-7 (tests/reference/population).
pub const MAX_NODES: usize = 40;

/// The orthonormal Hermite polynomial pₙ(x) (weight e^(−x²)) and its slope, by the
/// three-term recurrence: p₀ = π^(−¼), pⱼ₊₁ = x·√(2/(j+1))·pⱼ − √(j/(j+1))·pⱼ₋₁, pₙ' = √(2n)·pₙ₋₁.
fn hermite(n: usize, x: f64) -> (f64, f64) {
    let (mut p, mut previous) = (std::f64::consts::PI.powf(-0.25), 0.0);
    for j in 0..n {
        let next = x * (2.0 / (j + 1) as f64).sqrt() * p - (j as f64 / (j + 1) as f64).sqrt() * previous;
        previous = p;
        p = next;
    }
    (p, (2.0 * n as f64).sqrt() * previous)
}

/// The n-node Gauss–Hermite rule, 1 ≤ n ≤ [`MAX_NODES`]: the Golub–Welsch eigenvalues polished
/// by Newton's method on pₙ, and the weights 2/pₙ'(xᵢ)² of the orthonormal recurrence
/// (Abramowitz & Stegun 25.4.46 in this normalisation; recalled, not checked), which keep their
/// relative accuracy in the tails where eigenvector components lose it.
pub fn gauss_hermite(n: usize) -> Rule {
    assert!((1..=MAX_NODES).contains(&n), "a rule of {n} nodes");
    let jacobi =
        DMatrix::from_fn(n, n, |i, j| if i.abs_diff(j) == 1 { (i.max(j) as f64 / 2.0).sqrt() } else { 0.0 });
    let mut nodes: Vec<f64> = SymmetricEigen::new(jacobi).eigenvalues.iter().copied().collect();
    nodes.sort_by(f64::total_cmp);
    // The rule is symmetric: polish the upper half and mirror it.
    let mut pairs = vec![(0.0, 0.0); n];
    for i in n / 2..n {
        let mut x = nodes[i];
        for _ in 0..4 {
            let (p, slope) = hermite(n, x);
            if slope != 0.0 {
                x -= p / slope;
            }
        }
        if n % 2 == 1 && i == n / 2 {
            x = 0.0;
        }
        let slope = hermite(n, x).1;
        let ln_w = 2f64.ln() - 2.0 * slope.abs().ln();
        pairs[i] = (x, ln_w);
        pairs[n - 1 - i] = (-x, ln_w);
    }
    Rule { nodes: pairs.iter().map(|p| p.0).collect(), ln_weights: pairs.iter().map(|p| p.1).collect() }
}

/// The n-node rule, 1 ≤ n ≤ [`MAX_NODES`], computed once per process: a subject's nodes are
/// placed from their rules at every adaptation, and (beyond the held-node budget) at every
/// evaluation.
pub fn rule(n: usize) -> &'static Rule {
    static RULES: OnceLock<Vec<Rule>> = OnceLock::new();
    &RULES.get_or_init(|| (1..=MAX_NODES).map(gauss_hermite).collect())[n - 1]
}

#[cfg(test)]
mod tests {
    use super::*;

    /// ∫ x^(2m) e^(−x²) dx = Γ(m + ½) = (2m − 1)!!·√π / 2^m (an exact identity).
    fn even_moment(m: u32) -> f64 {
        let double_factorial: f64 = (1..=m).map(|k| (2 * k - 1) as f64).product();
        double_factorial * std::f64::consts::PI.sqrt() / 2f64.powi(m as i32)
    }

    #[test]
    fn rules_integrate_polynomials_below_twice_their_size_exactly() {
        for n in 1..=MAX_NODES {
            let rule = gauss_hermite(n);
            // High moments grow like Γ(m + ½); beyond degree 40 their sums lose digits to
            // cancellation, not to the rule.
            for degree in 0..(2 * n as u32).min(40) {
                let sum: f64 = rule
                    .nodes
                    .iter()
                    .zip(&rule.ln_weights)
                    .map(|(x, lw)| lw.exp() * x.powi(degree as i32))
                    .sum();
                let want = if degree % 2 == 1 { 0.0 } else { even_moment(degree / 2) };
                let scale: f64 = rule
                    .nodes
                    .iter()
                    .zip(&rule.ln_weights)
                    .map(|(x, lw)| lw.exp() * x.abs().powi(degree as i32))
                    .sum();
                assert!(
                    (sum - want).abs() <= 1e-13 * scale.max(1.0),
                    "n {n}, degree {degree}: {sum} vs {want}"
                );
            }
        }
    }

    #[test]
    fn the_two_node_rule_is_the_closed_form() {
        // Nodes ±1/√2, weights √π/2 (closed form of the degree-2 Hermite polynomial's roots).
        let rule = gauss_hermite(2);
        assert!(
            (rule.nodes[1] - 0.5f64.sqrt()).abs() < 1e-15
                && (rule.nodes[0] + rule.nodes[1]).abs() < f64::MIN_POSITIVE
        );
        assert!((rule.ln_weights[0].exp() - std::f64::consts::PI.sqrt() / 2.0).abs() < 1e-15);
    }
}
