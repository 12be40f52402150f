//! Exact solutions of the linear one-compartment model.
//!
//! dA/dt = −k·A + ka·D + R(t),  dD/dt = −ka·D,  C = A/V,  k = CL/V,
//! with bolus doses added to A, oral doses (× F, after the lag time) added to D and infusions
//! adding their rate to R while they run. The model is linear and time-invariant, so any dose
//! history is the superposition of its doses; rather than summing one curve per dose at every
//! time (O(doses × times)), a walker carries the state forward through the merged, sorted
//! events and requested times with the exact propagator over each event-free interval, which costs
//! O(doses + times) after sorting. Values are right-continuous: at the instant of a bolus the
//! bolus counts.

pub(crate) mod kernel;
pub(crate) mod scalar;
pub(crate) mod schedule;
pub mod steady;

/// Strategies shared by the engine's property tests.
#[cfg(test)]
pub(crate) mod strategies {
    use crate::dosing::Route;
    use proptest::prelude::*;

    /// A value spread evenly on a log scale over [lo, hi).
    pub fn log_uniform(lo: f64, hi: f64) -> impl Strategy<Value = f64> {
        (lo.ln()..hi.ln()).prop_map(f64::exp)
    }

    /// Any of the three routes.
    pub fn route() -> impl Strategy<Value = Route> {
        prop_oneof![Just(Route::Bolus), Just(Route::Infusion), Just(Route::Oral)]
    }
}

use crate::dosing::{Dose, Route};
use crate::error::InputError;
use kernel::{Propagator, Rates, State};
use scalar::Real;
use serde::{Deserialize, Serialize};

/// Individual pharmacokinetic parameters, in base units.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Params {
    /// Clearance (L/h).
    pub cl_l_h: f64,
    /// Volume of distribution (L).
    pub v_l: f64,
    /// First-order absorption rate constant (1/h); needed only for oral doses.
    pub ka_per_h: Option<f64>,
    /// Oral bioavailability (0–1].
    pub f: f64,
    /// Oral absorption lag time (h).
    pub tlag_h: f64,
}

impl Params {
    /// Intravenous parameters (no absorption).
    pub fn iv(cl_l_h: f64, v_l: f64) -> Self {
        Params { cl_l_h, v_l, ka_per_h: None, f: 1.0, tlag_h: 0.0 }
    }

    /// Elimination rate constant k = CL/V (1/h).
    pub fn k_per_h(&self) -> f64 {
        self.cl_l_h / self.v_l
    }

    /// Half-life ln 2 / k (h).
    pub fn half_life_h(&self) -> f64 {
        std::f64::consts::LN_2 / self.k_per_h()
    }

    /// The half-life of the curve's final decline (h): elimination's, or after an oral dose the
    /// slower of elimination and absorption (when absorption is slower, "flip-flop" kinetics,
    /// it sets the decline).
    pub fn terminal_half_life_h(&self, oral: bool) -> f64 {
        let slowest = match self.ka_per_h {
            Some(ka) if oral => self.k_per_h().min(ka),
            _ => self.k_per_h(),
        };
        std::f64::consts::LN_2 / slowest
    }

    /// Check the values, and that oral doses have what they need. Returns what is wrong.
    pub fn validate(&self, doses: &[Dose]) -> Result<(), InputError> {
        let positive = |x: f64| x.is_finite() && x > 0.0;
        if !positive(self.cl_l_h) {
            return Err(InputError::field(
                "cl_l_h",
                format!("clearance must be positive, found {} L/h", self.cl_l_h),
            ));
        }
        if !positive(self.v_l) {
            return Err(InputError::field("v_l", format!("volume must be positive, found {} L", self.v_l)));
        }
        validate_absorption(self.ka_per_h, self.f, self.tlag_h)?;
        if self.ka_per_h.is_none() && doses.iter().any(|d| d.route == Route::Oral) {
            return Err(InputError::field("ka_per_h", "oral doses need an absorption rate constant (ka)"));
        }
        Ok(())
    }
}

/// Check the absorption parameters: ka > 0 when given, F in (0, 1], lag time ≥ 0.
pub fn validate_absorption(ka_per_h: Option<f64>, f: f64, tlag_h: f64) -> Result<(), InputError> {
    if let Some(ka) = ka_per_h
        && !(ka.is_finite() && ka > 0.0)
    {
        return Err(InputError::field("ka_per_h", format!("ka must be positive, found {ka} 1/h")));
    }
    if !(f.is_finite() && f > 0.0 && f <= 1.0) {
        return Err(InputError::field("f", format!("bioavailability F must be in (0, 1], found {f}")));
    }
    if !(tlag_h.is_finite() && tlag_h >= 0.0) {
        return Err(InputError::field(
            "tlag_h",
            format!("the lag time must be non-negative, found {tlag_h} h"),
        ));
    }
    Ok(())
}

/// The parameters in the number type the engine computes in (plain or with derivatives).
#[derive(Debug, Clone, Copy)]
pub(crate) struct Kinetics<R> {
    /// Elimination rate constant (1/h).
    pub k: R,
    /// Volume (L).
    pub v: R,
    /// Absorption rate constant (1/h); unused without oral doses.
    pub ka: R,
    /// Bioavailability of oral doses.
    pub f: R,
    /// Oral lag time (h); not differentiated.
    pub tlag_h: f64,
}

impl From<&Params> for Kinetics<f64> {
    fn from(p: &Params) -> Self {
        Kinetics { k: p.k_per_h(), v: p.v_l, ka: p.ka_per_h.unwrap_or(f64::NAN), f: p.f, tlag_h: p.tlag_h }
    }
}

/// What happens to the state at an instant.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Input {
    Bolus(f64),
    RateOn(f64),
    RateOff(f64),
    Depot(f64),
}

/// A dose history turned into sorted state changes.
#[derive(Debug, Clone)]
pub(crate) struct Events {
    list: Vec<(f64, Input)>,
}

impl Events {
    /// Build the sorted event list of a dose history (lag times are applied here).
    pub fn new(doses: &[Dose], tlag_h: f64) -> Self {
        let mut list = Vec::with_capacity(doses.len() + doses.len() / 2);
        for d in doses {
            match d.route {
                Route::Bolus => list.push((d.time_h, Input::Bolus(d.amount_mg))),
                Route::Oral => list.push((d.time_h + tlag_h, Input::Depot(d.amount_mg))),
                Route::Infusion => {
                    // The rate spreads the amount over the span between the two event times
                    // as rounded, so the whole amount is given however short the infusion;
                    // one too short to move the clock at all is a bolus.
                    let end = d.time_h + d.duration_h;
                    let span = end - d.time_h;
                    if span > 0.0 {
                        let rate = d.amount_mg / span;
                        list.push((d.time_h, Input::RateOn(rate)));
                        list.push((end, Input::RateOff(rate)));
                    } else {
                        list.push((d.time_h, Input::Bolus(d.amount_mg)));
                    }
                }
            }
        }
        // Stable sort: already-sorted histories (the usual case) cost O(n).
        list.sort_by(|a, b| a.0.total_cmp(&b.0));
        Events { list }
    }

    /// Time of the first event, if any.
    pub fn first_time(&self) -> Option<f64> {
        self.list.first().map(|e| e.0)
    }

    /// The events at or after `start`.
    fn from(&self, start: f64) -> &[(f64, Input)] {
        &self.list[self.list.partition_point(|e| e.0 < start)..]
    }

    /// Where a walk to the ascending `times` starts: the first event, or the first time if
    /// earlier.
    fn walk_start(&self, times: &[f64]) -> f64 {
        self.first_time().unwrap_or(f64::INFINITY).min(times.first().copied().unwrap_or(0.0))
    }
}

/// The walk's bookkeeping that no parameter enters: the events still to come, the clock, the
/// infusion rate running and the steps taken since the last event. The [`Walker`] follows it
/// step by step; a [`schedule::Schedule`] records it once for a history walked many times.
///
/// The infusion rate is summed with Neumaier compensation and reset to exactly zero when no
/// infusion runs, so a very short (very high-rate) infusion does not leave rounding residue
/// in the rate of the others.
#[derive(Debug, Clone)]
struct Clock<'a> {
    events: &'a [(f64, Input)],
    next: usize,
    time: f64,
    rate_sum: f64,
    rate_comp: f64,
    running: usize,
    /// The time of the last event (or the start), and the steps taken since.
    anchor_time: f64,
    chained: u32,
}

/// One step of a walk: `dt` hours at infusion rate `rate` (mg/h). When `from_anchor` is set,
/// the state after the step is taken afresh over that many hours from the state after the last
/// event (see [`REANCHOR_EVERY`]).
#[derive(Debug, Clone, Copy)]
struct Step {
    dt: f64,
    rate: f64,
    from_anchor: Option<f64>,
}

/// Steps taken in a row between two computations of the state afresh from the last event:
/// 64 roundings of about 1e-16 stay far below 1e-12.
const REANCHOR_EVERY: u32 = 64;

impl<'a> Clock<'a> {
    fn new(events: &'a [(f64, Input)], start: f64) -> Self {
        Clock {
            events,
            next: 0,
            time: start,
            rate_sum: 0.0,
            rate_comp: 0.0,
            running: 0,
            anchor_time: start,
            chained: 0,
        }
    }

    fn rate(&self) -> f64 {
        if self.running == 0 { 0.0 } else { self.rate_sum + self.rate_comp }
    }

    fn add_rate(&mut self, x: f64) {
        let t = self.rate_sum + x;
        if self.rate_sum.abs() >= x.abs() {
            self.rate_comp += (self.rate_sum - t) + x;
        } else {
            self.rate_comp += (x - t) + self.rate_sum;
        }
        self.rate_sum = t;
    }

    /// The next event if it falls at or before `t` (not yet taken).
    fn event_until(&self, t: f64) -> Option<(f64, Input)> {
        self.events.get(self.next).copied().filter(|e| e.0 <= t)
    }

    /// The step to time `to`, or `None` when no time passes.
    fn step_to(&mut self, to: f64) -> Option<Step> {
        let dt = to - self.time;
        if dt <= 0.0 {
            return None;
        }
        let from_anchor = self.move_to(to);
        Some(Step { dt, rate: self.rate(), from_anchor })
    }

    /// Move the clock on to `to` (after the current time), counting the step; returns the span
    /// from the last event when the state is due to be taken afresh from there. A reused step
    /// repeats its rounding at every point; every so many points the state is taken afresh, so
    /// no error accumulates along a long grid.
    #[inline]
    fn move_to(&mut self, to: f64) -> Option<f64> {
        self.chained += 1;
        let from_anchor = (self.chained >= REANCHOR_EVERY).then(|| {
            self.chained = 0;
            to - self.anchor_time
        });
        self.time = to;
        from_anchor
    }

    /// Take the next event: its effect on the infusion rate, and the anchor moves to it.
    fn take(&mut self, input: Input) {
        match input {
            Input::RateOn(r) => {
                self.running += 1;
                self.add_rate(r);
            }
            Input::RateOff(r) => {
                self.running = self.running.saturating_sub(1);
                if self.running == 0 {
                    self.rate_sum = 0.0;
                    self.rate_comp = 0.0;
                } else {
                    self.add_rate(-r);
                }
            }
            Input::Bolus(_) | Input::Depot(_) => {}
        }
        self.anchor_time = self.time;
        self.chained = 0;
        self.next += 1;
    }
}

impl Input {
    /// The event's effect on the amounts (bioavailability `f` for the depot).
    fn enter<R: Real>(self, state: &mut State<R>, f: R) {
        match self {
            Input::Bolus(a) => state.central += R::cst(a),
            Input::Depot(a) => state.depot += f * a,
            Input::RateOn(_) | Input::RateOff(_) => {}
        }
    }
}

/// Carries the model state forward in time through a sorted event list.
#[derive(Debug, Clone)]
pub(crate) struct Walker<'a, R> {
    kin: Kinetics<R>,
    clock: Clock<'a>,
    state: State<R>,
    integral: R,
    integrate: bool,
    /// The steps of the last two interval lengths, reused when a length repeats (a uniform
    /// grid's intervals take one or two lengths in floating point), and the one used last.
    steps: [Propagator<R>; 2],
    last: usize,
    /// The state after the last event (or the start).
    anchor: State<R>,
}

impl<'a, R: Real> Walker<'a, R> {
    /// Start with no drug at the time of the first event (or at `start` if earlier).
    pub fn new(kin: Kinetics<R>, events: &'a Events, start: f64) -> Self {
        Self::from_state(kin, events, start, State::empty())
    }

    /// Start from a given state at time `start`; events before `start` are skipped.
    pub fn from_state(kin: Kinetics<R>, events: &'a Events, start: f64, state: State<R>) -> Self {
        Walker {
            kin,
            clock: Clock::new(events.from(start), start),
            state,
            integral: R::cst(0.0),
            integrate: true,
            steps: [Propagator::none(); 2],
            last: 0,
            anchor: state,
        }
    }

    fn advance(&mut self, to: f64) {
        let Some(step) = self.clock.step_to(to) else { return };
        let rates = Rates { k: self.kin.k, ka: self.kin.ka };
        // The last length used first, then the other, else a new step replaces the older.
        let slot = if self.steps[self.last].is_for(step.dt) {
            self.last
        } else if self.steps[1 - self.last].is_for(step.dt) {
            1 - self.last
        } else {
            self.steps[1 - self.last] = Propagator::new(rates, step.dt);
            1 - self.last
        };
        self.last = slot;
        let (mut s, i) = self.steps[slot].apply(self.state, rates, step.rate, self.integrate);
        if let Some(span) = step.from_anchor {
            s = kernel::step(self.anchor, rates, step.rate, span, false).0;
        }
        self.state = s;
        self.integral += i;
    }

    /// Move to time `t` (not before the current time), applying every event at or before `t`.
    pub fn run_to(&mut self, t: f64) {
        while let Some((te, input)) = self.clock.event_until(t) {
            self.advance(te);
            self.clock.take(input);
            input.enter(&mut self.state, self.kin.f);
            self.anchor = self.state;
        }
        self.advance(t);
    }

    /// Walk on along `times` (ascending, none before the current time) while no event comes
    /// and each interval has the length of one of the two steps kept, handing each
    /// concentration to `each`; returns how many times were walked. On a uniform grid this is
    /// the whole stretch between two events, walked with the arithmetic of [`Walker::run_to`]
    /// (the same steps, re-anchored as often) but without its event look-up and step choice at
    /// every point: the steps' factors are made ready once for the stretch. Predictions only
    /// (no integral).
    fn glide(&mut self, times: &[f64], each: &mut impl FnMut(R)) -> usize {
        debug_assert!(!self.integrate);
        let until = self.clock.events.get(self.clock.next).map_or(f64::INFINITY, |e| e.0);
        // The slot of the step from `time` to `t`, if `t` comes before the next event; chosen
        // without a branch, as a grid's two lengths alternate irregularly.
        let slot_for = |steps: &[Propagator<R>; 2], time: f64, t: f64| {
            let dt = t - time;
            let fits = steps.map(|s| s.is_for(dt));
            (t < until && (fits[0] | fits[1])).then_some(usize::from(fits[1]))
        };
        if times.first().and_then(|&t| slot_for(&self.steps, self.clock.time, t)).is_none() {
            return 0;
        }
        let rates = Rates { k: self.kin.k, ka: self.kin.ka };
        let depot = self.state.depot.val() != 0.0;
        let rate = self.clock.rate();
        let ready = self.steps.map(|step| step.prediction(rates, rate, depot));
        let mut walked = 0;
        for &t in times {
            let Some(slot) = slot_for(&self.steps, self.clock.time, t) else { break };
            self.state = match self.clock.move_to(t) {
                Some(span) => kernel::step(self.anchor, rates, rate, span, false).0,
                None => ready[slot].apply(self.state),
            };
            self.last = slot;
            each(self.concentration());
            walked += 1;
        }
        walked
    }

    /// Concentration at the current time (mg/L).
    pub fn concentration(&self) -> R {
        self.state.central / self.kin.v
    }

    /// ∫C dt since the walker started (mg·h/L).
    pub fn auc(&self) -> R {
        self.integral / self.kin.v
    }

    /// Skip the AUC integral (predictions only: about a third less work per step).
    pub fn without_auc(mut self) -> Self {
        self.integrate = false;
        self
    }

    /// Start integrating afresh from the current time.
    pub fn restart_auc(&mut self) {
        self.integral = R::cst(0.0);
    }

    /// The current state.
    pub fn state(&self) -> State<R> {
        self.state
    }
}

/// Concentrations (mg/L) at `times` (any order) for a dose history.
///
/// The caller validates `params` against `doses` first ([`Params::validate`]).
///
/// ```
/// use cistern::engine::{Params, concentrations};
/// use cistern::{Dose, Route};
///
/// let params = Params::iv(5.0, 50.0); // CL 5 L/h, V 50 L: k = 0.1 per hour
/// let dose = Dose { time_h: 0.0, amount_mg: 1000.0, route: Route::Bolus, duration_h: 0.0 };
/// params.validate(&[dose])?;
/// let c = concentrations(&params, &[dose], &[10.0, 0.0]);
/// assert!((c[0] - 20.0 * (-1.0f64).exp()).abs() < 1e-12);
/// assert!((c[1] - 20.0).abs() < 1e-12);
/// # Ok::<(), cistern::InputError>(())
/// ```
pub fn concentrations(params: &Params, doses: &[Dose], times: &[f64]) -> Vec<f64> {
    concentrations_with(Kinetics::from(params), doses, times)
}

/// [`concentrations`] in any number type (used with [`scalar::Dual`] for exact gradients).
pub(crate) fn concentrations_with<R: Real>(kin: Kinetics<R>, doses: &[Dose], times: &[f64]) -> Vec<R> {
    let events = Events::new(doses, kin.tlag_h);
    if times.is_sorted_by(|a, b| a <= b) {
        let mut out = vec![R::cst(0.0); times.len()];
        predict(kin, &events, times, &mut out);
        return out;
    }
    let mut order: Vec<usize> = (0..times.len()).collect();
    order.sort_by(|&a, &b| times[a].total_cmp(&times[b]));
    let sorted: Vec<f64> = order.iter().map(|&i| times[i]).collect();
    let mut values = vec![R::cst(0.0); times.len()];
    predict(kin, &events, &sorted, &mut values);
    let mut out = vec![R::cst(0.0); times.len()];
    for (i, v) in order.into_iter().zip(values) {
        out[i] = v;
    }
    out
}

/// Concentrations at ascending `times` into `out`, for an event list built once and reused
/// (the fitter evaluates the same history many times).
pub(crate) fn predict<R: Real>(kin: Kinetics<R>, events: &Events, times: &[f64], out: &mut [R]) {
    let mut slots = out.iter_mut();
    predict_each(kin, events, times, |c| {
        if let Some(slot) = slots.next() {
            *slot = c;
        }
    });
}

/// The concentration at each of the ascending `times`, handed to `each` in order: an objective
/// sums its terms as they come, without a vector per evaluation.
pub(crate) fn predict_each<R: Real>(
    kin: Kinetics<R>,
    events: &Events,
    times: &[f64],
    mut each: impl FnMut(R),
) {
    let mut walker = Walker::new(kin, events, events.walk_start(times)).without_auc();
    let mut rest = times;
    while let Some((&t, after)) = rest.split_first() {
        walker.run_to(t);
        each(walker.concentration());
        rest = &after[walker.glide(after, &mut each)..];
    }
}

/// Exact AUC (mg·h/L) of the concentration curve from `t0` to `t1` (t0 ≤ t1).
pub fn auc(params: &Params, doses: &[Dose], t0: f64, t1: f64) -> f64 {
    let events = Events::new(doses, params.tlag_h);
    let start = events.first_time().unwrap_or(t0).min(t0);
    let mut walker = Walker::new(Kinetics::from(params), &events, start);
    walker.run_to(t0);
    walker.restart_auc();
    walker.run_to(t1);
    walker.auc()
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;
    use proptest::test_runner::RngSeed;

    use super::strategies::{log_uniform, route};

    prop_compose! {
        /// k in [0.001, 10] /h; ka a multiple of k in [0.01, 100] or equal to it; lag up to
        /// 5 h; 1–40 doses of every route at random times over 0–500 h (infusions up to 30 h,
        /// so they overlap); a grid of 2,000–40,000 points from a random start, step
        /// 0.001–2 h, so that doses fall between points.
        fn case()(cl in log_uniform(0.3, 30.0), v in log_uniform(3.0, 300.0),
                  ratio in prop_oneof![3 => log_uniform(0.01, 100.0), 1 => Just(1.0)],
                  f in 0.2..=1.0, tlag in prop_oneof![Just(0.0), 0.0..5.0],
                  doses in prop::collection::vec((0.0..500.0, log_uniform(0.1, 5000.0), route(),
                                                  log_uniform(0.01, 30.0)), 1..40),
                  start in -10.0..100.0, step in log_uniform(1e-3, 2.0), points in 2_000usize..40_000)
                  -> (Params, Vec<Dose>, Vec<f64>) {
            let params = Params { cl_l_h: cl, v_l: v, ka_per_h: Some(ratio * cl / v), f, tlag_h: tlag };
            let doses = doses.into_iter().map(|(time_h, amount_mg, route, d)| Dose {
                time_h, amount_mg, route, duration_h: if route == Route::Infusion { d } else { 0.0 },
            }).collect();
            // As `--times START:END:STEP` makes it.
            let grid = (0..points).map(|i| start + i as f64 * step).collect();
            (params, doses, grid)
        }
    }

    proptest! {
        #![proptest_config(ProptestConfig {
            cases: 300,
            rng_seed: RngSeed::Fixed(0x5EED_0014),
            failure_persistence: None,
            ..ProptestConfig::default()
        })]

        /// The walk along a uniform grid (the step of each interval length computed once and
        /// reused from point to point) against the general engine evaluating each time on its
        /// own (a fresh walk from the first dose, stepping from event to event and then to the
        /// time): agreement to 1e-12 relative, or both below 1e-100 mg/L, at 400 points spread
        /// over grids of up to 40,000 points, so that error accumulated along the grid would show.
        #[test]
        fn the_grid_walk_agrees_with_a_fresh_walk_to_each_time((p, doses, grid) in case()) {
            let walked = concentrations(&p, &doses, &grid);
            for i in (0..grid.len()).step_by(grid.len() / 400) {
                let fresh = concentrations(&p, &doses, &grid[i..=i])[0];
                let got = walked[i];
                prop_assert!(
                    (got - fresh).abs() <= 1e-12 * fresh.abs() || (got.abs() < 1e-100 && fresh.abs() < 1e-100),
                    "point {i} (t = {} h): grid walk {got}, fresh walk {fresh} (relative {:e})",
                    grid[i], (got / fresh - 1.0).abs()
                );
            }
        }
    }
}
