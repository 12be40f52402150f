//! Exact propagation of the one-compartment state over an interval with no events.
//!
//! State: central amount A (mg), absorption depot D (mg), constant infusion rate R (mg/h).
//! With elimination rate k and absorption rate ka, over an interval of length t:
//!
//! ```text
//! A(t) = A0·e^(−k t) + R·t·φ1(k t) + D0·ka·G(t)        D(t) = D0·e^(−ka t)
//! ∫A  = A0·t·φ1(k t) + R·t²·φ2(k t) + D0·ka·H(t)
//! ```
//!
//! where φ1(x) = (1 − e^(−x))/x, φ2(x) = (x − 1 + e^(−x))/x² and, with m = min(k, ka),
//! M = max(k, ka), δ = M − m,
//!
//! ```text
//! G(t) = (e^(−k t) − e^(−ka t))/(ka − k) = e^(−m t)·t·φ1(δ t)
//! H(t) = ∫₀ᵗ G = t²·[(m/M)·j1(m t) + (δ/M)·e^(−m t)·φ2(δ t)],   j1(x) = ∫₀¹ u·e^(−x u) du
//! ```
//!
//! Every term is a sum of non-negative parts, so there is no cancellation: ka → k (the limit
//! form t·e^(−k t) comes out by itself), k·t → 0 and k·t → ∞ (no overflow: every exponent is
//! negative) are all exact to rounding. Small arguments use Taylor series. The derivations
//! are in docs/methods.md.

use super::scalar::Real;

/// Below this argument the functions use their Taylor series (11 terms reach 1e-17).
const SERIES_BELOW: f64 = 0.1;

/// Σ cₙ·(−x)ⁿ by Horner's rule, with cₙ = 1 / `denominator(n)`.
fn series<R: Real>(x: R, denominator: impl Fn(u32) -> f64) -> R {
    let mut acc = R::cst(0.0);
    for n in (0..12).rev() {
        acc = acc * (-x) + 1.0 / denominator(n);
    }
    acc
}

fn factorial(n: u32) -> f64 {
    (1..=n).map(f64::from).product()
}

/// φ1(x) = (1 − e^(−x))/x, φ1(0) = 1.
pub fn phi1<R: Real>(x: R) -> R {
    if x.val().abs() < SERIES_BELOW { series(x, |n| factorial(n + 1)) } else { -(-x).exp_m1() / x }
}

/// φ2(x) = (x − 1 + e^(−x))/x², φ2(0) = 1/2.
pub fn phi2<R: Real>(x: R) -> R {
    if x.val().abs() < SERIES_BELOW { series(x, |n| factorial(n + 2)) } else { (R::cst(1.0) - phi1(x)) / x }
}

/// j1(x) = ∫₀¹ u·e^(−x u) du = (1 − e^(−x)(1 + x))/x², j1(0) = 1/2.
pub fn j1<R: Real>(x: R) -> R {
    if x.val().abs() < SERIES_BELOW {
        series(x, |n| factorial(n) * f64::from(n + 2))
    } else {
        (phi1(x) - (-x).exp()) / x
    }
}

fn min_max<R: Real>(a: R, b: R) -> (R, R) {
    if a.val() <= b.val() { (a, b) } else { (b, a) }
}

/// G(t) = (e^(−k t) − e^(−ka t))/(ka − k): the central amount at t per unit of ka·D0.
pub fn depot_to_central<R: Real>(k: R, ka: R, t: f64) -> R {
    let (m, _) = min_max(k, ka);
    depot_to_central_from(k, ka, t, (m * -t).exp())
}

/// G(t) given `e_min` = e^(−m t), m = min(k, ka).
fn depot_to_central_from<R: Real>(k: R, ka: R, t: f64, e_min: R) -> R {
    let (m, big) = min_max(k, ka);
    e_min * phi1((big - m) * t) * t
}

/// H(t) = ∫₀ᵗ G(s) ds: the central-amount integral per unit of ka·D0.
pub fn depot_to_central_integral<R: Real>(k: R, ka: R, t: f64) -> R {
    let (m, big) = min_max(k, ka);
    let delta = big - m;
    let mt = m * t;
    ((m / big) * j1(mt) + (delta / big) * (-mt).exp() * phi2(delta * t)) * (t * t)
}

/// The model's state between events.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct State<R> {
    /// Amount in the central compartment (mg).
    pub central: R,
    /// Amount in the absorption depot (mg).
    pub depot: R,
}

impl<R: Real> State<R> {
    /// No drug anywhere.
    pub fn empty() -> Self {
        State { central: R::cst(0.0), depot: R::cst(0.0) }
    }
}

/// Rates of the model in 1/h.
#[derive(Debug, Clone, Copy)]
pub struct Rates<R> {
    /// Elimination rate constant k = CL/V.
    pub k: R,
    /// Absorption rate constant (only used when the depot holds drug).
    pub ka: R,
}

/// φ1(x) given e = e^(−x): the exponential is computed once per step and shared.
fn phi1_from<R: Real>(x: R, e: R) -> R {
    if x.val().abs() < SERIES_BELOW {
        phi1(x)
    } else {
        // 1 − e^(−x) ≥ 0.095 here, so the subtraction loses at most a digit.
        (R::cst(1.0) - e) / x
    }
}

/// φ2(x) given φ1(x).
fn phi2_from<R: Real>(x: R, p1: R) -> R {
    if x.val().abs() < SERIES_BELOW { phi2(x) } else { (R::cst(1.0) - p1) / x }
}

/// Advance `state` by `t` hours under constant infusion rate `rate` (mg/h).
/// Returns the new state and, when `integrate` is set, ∫A over the interval (mg·h).
pub fn step<R: Real>(state: State<R>, rates: Rates<R>, rate: f64, t: f64, integrate: bool) -> (State<R>, R) {
    Propagator::new(rates, t).apply(state, rates, rate, integrate)
}

/// The exact step over intervals of one length `t`: its factors (e^(−k t), φ1, φ2, G, H,
/// e^(−ka t)) are computed once, when first needed, and reused for every interval of that
/// length — on a uniform time grid the walk then costs a few multiplications a point, the
/// per-step recurrence, with the very arithmetic of a fresh step.
///
/// φ1 and φ2 are computed only when used: predictions without an infusion running need the
/// exponential alone (the fitter's objective evaluates mostly such steps).
#[derive(Debug, Clone, Copy)]
pub struct Propagator<R> {
    /// The interval's length (h).
    t: f64,
    kt: R,
    e: R,
    p1: Option<R>,
    p2: Option<R>,
    g: Option<R>,
    h: Option<R>,
    ea: Option<R>,
}

impl<R: Real> Propagator<R> {
    /// The step of length `t` (only e^(−k t) is computed now).
    #[inline]
    pub fn new(rates: Rates<R>, t: f64) -> Self {
        let kt = rates.k * t;
        Propagator { t, kt, e: (-kt).exp(), p1: None, p2: None, g: None, h: None, ea: None }
    }

    /// A step of no length yet (NaN, equal to none), to be replaced.
    pub fn none() -> Self {
        let zero = R::cst(0.0);
        Propagator { t: f64::NAN, kt: zero, e: zero, p1: None, p2: None, g: None, h: None, ea: None }
    }

    /// Whether this is the step for an interval of length `t`: exactly that length, since a
    /// step of another length, however near, is another step.
    #[allow(clippy::float_cmp)]
    pub fn is_for(&self, t: f64) -> bool {
        self.t == t
    }

    /// Advance `state` under constant infusion rate `rate` (mg/h), with the `rates` this step
    /// was made for; also ∫A over the interval (mg·h) when `integrate` is set.
    #[inline]
    pub fn apply(&mut self, state: State<R>, rates: Rates<R>, rate: f64, integrate: bool) -> (State<R>, R) {
        let (t, kt, e) = (self.t, self.kt, self.e);
        let mut integral = R::cst(0.0);
        let mut infused = None;
        if integrate || rate != 0.0 {
            let p1 = *self.p1.get_or_insert_with(|| phi1_from(kt, e));
            if integrate {
                integral = state.central * p1 * t;
            }
            if rate != 0.0 {
                infused = Some(p1 * (rate * t));
                if integrate {
                    integral += *self.p2.get_or_insert_with(|| phi2_from(kt, p1)) * (rate * t * t);
                }
            }
        }
        if integrate && state.depot.val() != 0.0 {
            let h = *self.h.get_or_insert_with(|| depot_to_central_integral(rates.k, rates.ka, t));
            integral += rates.ka * state.depot * h;
        }
        let next = advance(state, rates.ka, e, infused, || self.absorption(rates));
        (next, integral)
    }

    /// G(t) and e^(−ka t), computed when first needed and kept. G's exponential
    /// e^(−min(k, ka)·t) is e^(−k t) or e^(−ka t), which the step has anyway (k·(−t) is
    /// −(k·t) exactly), so it is not computed again.
    fn absorption(&mut self, rates: Rates<R>) -> (R, R) {
        let (t, e) = (self.t, self.e);
        let ea = *self.ea.get_or_insert_with(|| (rates.ka * -t).exp());
        let g = *self.g.get_or_insert_with(|| {
            let e_min = if rates.k.val() <= rates.ka.val() { e } else { ea };
            depot_to_central_from(rates.k, rates.ka, t, e_min)
        });
        (g, ea)
    }

    /// The factors of this step, all computed now: φ1 when an infusion may run over it
    /// (`infusing`), G and e^(−ka t) when the depot may hold drug (`absorbing`); the others
    /// are left at zero, unused. They are kept, as [`Propagator::apply`] keeps those it
    /// computes, for the next time.
    #[inline(always)]
    pub fn factors(&mut self, rates: Rates<R>, infusing: bool, absorbing: bool) -> Factors<R> {
        let zero = R::cst(0.0);
        let (kt, e) = (self.kt, self.e);
        let mut factors = Factors { e, p1: zero, g: zero, ea: zero };
        if infusing {
            factors.p1 = *self.p1.get_or_insert_with(|| phi1_from(kt, e));
        }
        if absorbing {
            (factors.g, factors.ea) = self.absorption(rates);
        }
        factors
    }
}

/// The factors of a step over one interval length (see [`Propagator::factors`]).
#[derive(Debug, Clone, Copy)]
pub struct Factors<R> {
    /// e^(−k t).
    pub e: R,
    /// φ1(k t).
    pub p1: R,
    /// G(t).
    pub g: R,
    /// e^(−ka t).
    pub ea: R,
}

/// The state after a step with decay factor `e` (e^(−k t)), the amount `infused` into the
/// central compartment over it (φ1·rate·t, when an infusion runs) and, asked for only when the
/// depot holds drug, `absorption`'s G and e^(−ka t): the one state update of the walker and of
/// a recorded schedule.
#[inline]
pub fn advance<R: Real>(
    state: State<R>,
    ka: R,
    e: R,
    infused: Option<R>,
    absorption: impl FnOnce() -> (R, R),
) -> State<R> {
    let mut central = state.central * e;
    if let Some(x) = infused {
        central += x;
    }
    let mut depot = state.depot;
    if depot.val() != 0.0 {
        let (g, ea) = absorption();
        central += ka * depot * g;
        depot = depot * ea;
    }
    State { central, depot }
}

/// Two steps without the integral, under one constant infusion rate and with drug in the depot
/// or not, their factors ready: for a loop that takes one or the other at every interval
/// ([`Walker::glide`](super::Walker::glide); a uniform grid's intervals take one of two lengths
/// in floating point, irregularly).
///
/// The steps are placed by one bit of their lengths' binary forms in which the two differ: the
/// same bit of an interval's length then says which of the two it can be, and one comparison
/// whether it is. A loop so finds its step by index, without a branch that the irregular
/// alternation of the lengths would mispredict, nor a choice between two values (which the
/// compiler turns into such a branch).
#[derive(Debug, Clone, Copy)]
pub struct Pair<R> {
    /// The bit that tells the two lengths apart.
    bit: u32,
    /// At each place: the binary form of the step's length (h), compared as an integer (a length
    /// is positive, so equal lengths are equal bits; an integer comparison takes one
    /// instruction and no floating-point port), which of the two `steps` given it is, and its
    /// factors: e^(−k t), R·t·φ1(k t) when an infusion runs, G(t) and e^(−ka t) when the depot
    /// held drug (else unused zeros). A place without a step (its length NaN: no second length
    /// seen yet) holds the other length's bits, which differ from its own place's in the
    /// telling bit, so that no interval, NaN included, is placed there.
    length_bits: [u64; 2],
    which: [usize; 2],
    e: [R; 2],
    infused: [R; 2],
    g: [R; 2],
    ea: [R; 2],
    /// ka when the depot held drug (else an unused zero).
    ka: R,
    infusing: bool,
}

impl<R: Real> Pair<R> {
    /// The two `steps` (of different lengths) under the infusion rate `rate`, with drug in the
    /// depot or not (`depot`).
    pub fn new(steps: &mut [Propagator<R>; 2], rates: Rates<R>, rate: f64, depot: bool) -> Self {
        let infusing = rate != 0.0;
        let bits = [steps[0].t.to_bits(), steps[1].t.to_bits()];
        debug_assert_ne!(bits[0], bits[1]);
        let bit = (bits[0] ^ bits[1]).trailing_zeros().min(63);
        // The step at place 0 is the one whose length has the bit clear.
        let which = if (bits[0] >> bit) & 1 == 0 { [0, 1] } else { [1, 0] };
        let f = which.map(|w| steps[w].factors(rates, infusing, depot));
        let length = which.map(|w| steps[w].t);
        let infused = |p: usize| if infusing { f[p].p1 * (rate * length[p]) } else { R::cst(0.0) };
        let length_bits = [0, 1].map(|p| if length[p] > 0.0 { length[p] } else { length[1 - p] }.to_bits());
        Pair {
            bit,
            length_bits,
            which,
            e: [f[0].e, f[1].e],
            infused: [infused(0), infused(1)],
            g: [f[0].g, f[1].g],
            ea: [f[0].ea, f[1].ea],
            ka: if depot { rates.ka } else { R::cst(0.0) },
            infusing,
        }
    }

    /// The place of the step for an interval of length `dt`, if it is one of the two (exactly
    /// that length, as [`Propagator::is_for`]).
    #[inline(always)]
    pub fn place(&self, dt: f64) -> Option<usize> {
        let bits = dt.to_bits();
        let place = ((bits >> self.bit) & 1) as usize;
        (self.length_bits[place] == bits).then_some(place)
    }

    /// Which of the two steps given to [`Pair::new`] is at `place`.
    pub fn which(&self, place: usize) -> usize {
        self.which[place]
    }

    /// Whether an infusion runs over the steps.
    pub fn infusing(&self) -> bool {
        self.infusing
    }

    /// Advance `state` by the step at `place`.
    pub fn apply(&self, state: State<R>, place: usize) -> State<R> {
        match (self.infusing, state.depot.val() != 0.0) {
            (false, false) => self.apply_shaped::<false, false>(state, place),
            (true, false) => self.apply_shaped::<true, false>(state, place),
            (false, true) => self.apply_shaped::<false, true>(state, place),
            (true, true) => self.apply_shaped::<true, true>(state, place),
        }
    }

    /// [`Pair::apply`] knowing whether an infusion runs (`INFUSING`, as [`Pair::infusing`]
    /// says) and whether the depot holds drug (`ABSORBING`, as `state.depot` must say): the
    /// arithmetic of [`advance`] without its tests, so that a loop written for one shape does
    /// only that shape's arithmetic.
    #[inline(always)]
    pub fn apply_shaped<const INFUSING: bool, const ABSORBING: bool>(
        &self,
        state: State<R>,
        place: usize,
    ) -> State<R> {
        let mut central = state.central * self.e[place];
        if INFUSING {
            central += self.infused[place];
        }
        if ABSORBING {
            central += self.ka * state.depot * self.g[place];
            return State { central, depot: state.depot * self.ea[place] };
        }
        State { central, depot: state.depot }
    }
}

#[cfg(test)]
#[allow(clippy::float_cmp)] // these values are exact in binary floating point
mod tests {
    use super::*;

    fn rel(a: f64, b: f64) -> f64 {
        (a - b).abs() / b.abs()
    }

    #[test]
    fn series_and_closed_forms_agree_at_the_switch() {
        // Both sides of the switch point must agree to rounding.
        for &x in &[SERIES_BELOW * (1.0 - 1e-12), SERIES_BELOW] {
            let closed1 = -(-x).exp_m1() / x;
            assert!(rel(phi1(x), closed1) < 1e-15);
            let closed2 = (x - 1.0 + (-x).exp()) / (x * x);
            assert!(rel(phi2(x), closed2) < 1e-13);
            let closed_j = (1.0 - (-x).exp() * (1.0 + x)) / (x * x);
            assert!(rel(j1(x), closed_j) < 1e-13);
        }
    }

    #[test]
    fn depot_functions_match_the_textbook_forms_away_from_ka_equal_k() {
        let (k, ka, t) = (0.2, 2.05, 3.0);
        let g = ((-k * t).exp() - (-ka * t).exp()) / (ka - k);
        assert!(rel(depot_to_central(k, ka, t), g) < 1e-14);
        let h = ((1.0 - (-k * t).exp()) / k - (1.0 - (-ka * t).exp()) / ka) / (ka - k);
        assert!(rel(depot_to_central_integral(k, ka, t), h) < 1e-13);
        // Symmetric in k and ka.
        assert!(rel(depot_to_central(ka, k, t), g) < 1e-14);
    }

    #[test]
    fn ka_equal_k_gives_the_limit_form() {
        let (k, t) = (0.3, 5.0);
        // G → t·e^(−k t); H → (1 − e^(−k t)(1 + k t))/k².
        assert!(rel(depot_to_central(k, k, t), t * (-k * t).exp()) < 1e-15);
        let h = (1.0 - (-k * t).exp() * (1.0 + k * t)) / (k * k);
        assert!(rel(depot_to_central_integral(k, k, t), h) < 1e-14);
        // Continuous through ka = k.
        let near = depot_to_central(k, k * (1.0 + 1e-9), t);
        assert!(rel(near, t * (-k * t).exp()) < 1e-8);
    }

    #[test]
    fn a_pair_places_exactly_its_lengths_and_nothing_at_a_place_without_a_step() {
        let rates = Rates { k: 0.1, ka: 1.1 };
        let (short, long) = (0.05, 0.05f64.next_up());
        let pair =
            Pair::new(&mut [Propagator::new(rates, long), Propagator::new(rates, short)], rates, 0.0, true);
        let (p, q) = (pair.place(short).unwrap(), pair.place(long).unwrap());
        assert_ne!(p, q);
        assert_eq!((pair.which(p), pair.which(q)), (1, 0));
        for dt in [0.05f64.next_down(), 0.05f64.next_up().next_up(), 0.0, -0.0, -short, f64::NAN] {
            assert_eq!(pair.place(dt), None, "{dt}");
        }
        // One length only (the other step not made yet, its length NaN).
        let pair = Pair::new(&mut [Propagator::new(rates, short), Propagator::none()], rates, 0.0, false);
        assert_eq!(pair.place(short).map(|p| pair.which(p)), Some(0));
        for dt in [f64::NAN, -f64::NAN, long, 0.0, -0.0, f64::INFINITY] {
            assert_eq!(pair.place(dt), None, "{dt}");
        }
    }

    #[test]
    fn huge_arguments_neither_overflow_nor_give_nan() {
        let (s, i) =
            step(State { central: 100.0, depot: 50.0 }, Rates { k: 50.0, ka: 1e-3 }, 10.0, 1e6, true);
        assert!(s.central.is_finite() && s.depot.is_finite() && i.is_finite());
        assert_eq!(s.depot, 0.0);
    }
}
