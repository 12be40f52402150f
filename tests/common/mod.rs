//! Helpers shared by the engine's verification tests (each test file uses a subset of them).

#![allow(dead_code)]

/// Relative error of `actual` against `expected`, measured against at least `floor`, so that
/// values which are essentially zero are compared absolutely (to `floor` times the tolerance).
pub fn rel_err(actual: f64, expected: f64, floor: f64) -> f64 {
    (actual - expected).abs() / expected.abs().max(floor)
}

/// Panics with `what` unless `actual` is within relative `tol` of `expected` (see [`rel_err`]).
#[track_caller]
pub fn assert_rel(actual: f64, expected: f64, tol: f64, floor: f64, what: &str) {
    let err = rel_err(actual, expected, floor);
    assert!(
        err <= tol && actual.is_finite(),
        "{what}: got {actual:e}, expected {expected:e}, relative error {err:e} > {tol:e}"
    );
}

/// Panics with `what` unless `actual` is within `tol` of `expected`.
#[track_caller]
pub fn assert_abs(actual: f64, expected: f64, tol: f64, what: &str) {
    assert!((actual - expected).abs() <= tol, "{what}: got {actual}, expected {expected} ± {tol}");
}

/// Where a unimodal `f` peaks on [lo, hi], by golden-section search on its values alone (no
/// formula for the peak is used). Near a smooth maximum values are flat to rounding over a
/// width of about √ε relative, which bounds the precision of the location.
pub fn argmax(f: impl Fn(f64) -> f64, mut lo: f64, mut hi: f64) -> f64 {
    let r = (5f64.sqrt() - 1.0) / 2.0;
    let (mut a, mut b) = (hi - r * (hi - lo), lo + r * (hi - lo));
    let (mut fa, mut fb) = (f(a), f(b));
    for _ in 0..200 {
        if fa < fb {
            lo = a;
            a = b;
            fa = fb;
            b = lo + r * (hi - lo);
            fb = f(b);
        } else {
            hi = b;
            b = a;
            fb = fa;
            a = hi - r * (hi - lo);
            fa = f(a);
        }
    }
    0.5 * (lo + hi)
}
