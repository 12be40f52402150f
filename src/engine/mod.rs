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
use kernel::{Pair, Propagator, Rates, State};
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
            self.span_since_anchor(to)
        });
        self.time = to;
        from_anchor
    }

    /// The span from the last event (or the start) to `to`.
    fn span_since_anchor(&self, to: f64) -> f64 {
        to - self.anchor_time
    }

    /// How many steps can be taken before the state is due to be taken afresh.
    fn plain_steps(&self) -> usize {
        (REANCHOR_EVERY - 1 - self.chained) as usize
    }

    /// The clock after `steps` steps (no more than [`Clock::plain_steps`]) ending at `to`.
    fn moved_plainly(&mut self, to: f64, steps: usize) {
        debug_assert!(steps <= self.plain_steps());
        self.chained += steps as u32;
        self.time = to;
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
    /// and each interval has the length of one of the two steps kept, writing each
    /// concentration to the same place in `out`; returns how many times were walked. On a
    /// uniform grid this is the whole stretch between two events, walked with the arithmetic of
    /// [`Walker::run_to`] (the same steps, re-anchored as often) but without its event look-up
    /// and step choice at every point: the two steps' factors are made ready once for the
    /// stretch ([`Pair`]), and the runs of points between two re-anchorings go through the
    /// tight loop of [`walk_runs`], two runs at a time. Predictions only (no integral).
    fn glide(&mut self, times: &[f64], out: &mut [R]) -> usize {
        debug_assert!(!self.integrate);
        let until = self.clock.events.get(self.clock.next).map_or(f64::INFINITY, |e| e.0);
        let time = self.clock.time;
        if !times.first().is_some_and(|&t| t < until && self.steps.iter().any(|s| s.is_for(t - time))) {
            return 0;
        }
        let rates = Rates { k: self.kin.k, ka: self.kin.ka };
        let rate = self.clock.rate();
        let pair = Pair::new(&mut self.steps, rates, rate, self.state.depot.val() != 0.0);
        let v = self.kin.v;
        let full = REANCHOR_EVERY as usize - 1;
        let mut walked = 0;
        // The state taken afresh where this run ends, if it comes there; computed a run ahead.
        let mut ahead = self.afresh_at(&pair, times, self.clock.plain_steps(), until, rates, rate);
        loop {
            // This run: the points before the next re-anchoring and the next event, from the
            // current state. Then, if this run reaches it, the point where the state is taken
            // afresh, and the next run from there, which does not depend on this one: the two
            // are walked side by side, two chains of steps in flight at once. The states taken
            // afresh are computed a run ahead, so that their exponentials run beside the walk.
            let this = self.run_from(times, walked, self.clock.plain_steps(), until);
            let next = ahead.take().filter(|n| n.at == walked + this.len());
            let after = next.map_or(times.len(), |n| n.at + 1);
            let next_run = self.run_from(times, after, full, until);
            let then = if next_run.len() == full {
                self.afresh_at(&pair, times, after + full, until, rates, rate)
            } else {
                None
            };
            ahead = then.and_then(|n| self.afresh_at(&pair, times, n.at + 1 + full, until, rates, rate));
            let (out_this, rest) = out[walked..].split_at_mut(this.len());
            let mut a = Run::new(self.state, self.clock.time, this, out_this);
            let (out_at, mut b) = match (next, rest.split_first_mut()) {
                (Some(n), Some((out_at, rest))) => {
                    let out_run = &mut rest[..next_run.len()];
                    (Some(out_at), Some(Run::new(n.state, n.time, next_run, out_run)))
                }
                _ => (None, None),
            };
            walk_runs(&pair, &mut a, b.as_mut(), v);
            walked += self.take_run(&pair, &a);
            let (Some(next), Some(out_at), Some(b)) = (next, out_at, b) else { return walked };
            if a.walked < this.len() {
                return walked;
            }
            self.take_afresh(&pair, next, out_at);
            walked += 1 + self.take_run(&pair, &b);
            let Some(then) = then.filter(|_| b.walked == next_run.len()) else { return walked };
            self.take_afresh(&pair, then, &mut out[walked]);
            walked += 1;
        }
    }

    /// The times from `from` on, at most `most`, that come before `until`.
    fn run_from<'t>(&self, times: &'t [f64], from: usize, most: usize, until: f64) -> &'t [f64] {
        let run = &times[from..times.len().min(from + most)];
        match run.last() {
            Some(&t) if t >= until => &run[..run.partition_point(|&t| t < until)],
            _ => run,
        }
    }

    /// The time at `at` and the state there taken afresh from the last event, if it comes
    /// before `until` after an interval of one of `pair`'s lengths (from the time before it, or
    /// the clock's); the clock re-anchors there when a run reaches it.
    fn afresh_at(
        &self,
        pair: &Pair<R>,
        times: &[f64],
        at: usize,
        until: f64,
        rates: Rates<R>,
        rate: f64,
    ) -> Option<Afresh<R>> {
        let time = *times.get(at).filter(|&&t| t < until)?;
        let before = at.checked_sub(1).map_or(self.clock.time, |i| times[i]);
        let place = pair.place(time - before)?;
        let state = kernel::step(self.anchor, rates, rate, self.clock.span_since_anchor(time), false).0;
        Some(Afresh { at, time, state, place })
    }

    /// Take the walked part of `run` (the plain steps since the clock's time).
    fn take_run(&mut self, pair: &Pair<R>, run: &Run<R>) -> usize {
        if run.walked > 0 {
            self.state = run.state;
            self.last = pair.which(run.last);
            self.clock.moved_plainly(run.time, run.walked);
        }
        run.walked
    }

    /// Take the point `at` (the step there from the clock's time), where the clock re-anchors;
    /// its concentration goes to `out`.
    fn take_afresh(&mut self, pair: &Pair<R>, at: Afresh<R>, out: &mut R) {
        self.state = match self.clock.move_to(at.time) {
            Some(_) => at.state,
            None => pair.apply(self.state, at.place),
        };
        self.last = pair.which(at.place);
        *out = self.concentration();
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

/// A point of a walk where the clock re-anchors ([`Walker::glide`]): its index among the
/// times, its time, the state there taken afresh and the place of the step to it.
#[derive(Debug, Clone, Copy)]
struct Afresh<R> {
    at: usize,
    time: f64,
    state: State<R>,
    place: usize,
}

/// A run of plain steps (no event, no re-anchoring) being walked: the state at `time` after
/// `walked` of `times`, the place of the last step, each concentration written to `out`.
struct Run<'a, R> {
    start: State<R>,
    start_time: f64,
    state: State<R>,
    time: f64,
    times: &'a [f64],
    out: &'a mut [R],
    walked: usize,
    last: usize,
}

impl<'a, R: Real> Run<'a, R> {
    fn new(state: State<R>, time: f64, times: &'a [f64], out: &'a mut [R]) -> Self {
        Run { start: state, start_time: time, state, time, times, out, walked: 0, last: 0 }
    }

    /// Walk on alone while each interval has the length of one of `pair`'s steps.
    #[inline(always)]
    fn walk(&mut self, pair: &Pair<R>, v: R, step: impl Fn(State<R>, usize) -> State<R>) {
        let (mut state, mut time, mut walked, mut last) = (self.state, self.time, self.walked, self.last);
        for (&t, c) in self.times[walked..].iter().zip(&mut self.out[walked..]) {
            let Some(place) = pair.place(t - time) else { break };
            state = step(state, place);
            *c = state.central / v;
            (time, walked, last) = (t, walked + 1, place);
        }
        (self.state, self.time, self.walked, self.last) = (state, time, walked, last);
    }

    /// Walk again from the start to where the run got, telling the shape at every step: the
    /// depot held drug at the start but ran out (decayed to zero, which stays zero) on the
    /// way, so some steps of the absorbing shape had the wrong one.
    fn walk_again_if_emptied(&mut self, pair: &Pair<R>, v: R) {
        if self.start.depot.val() != 0.0 && self.state.depot.val() == 0.0 {
            let walked = self.walked;
            (self.state, self.time, self.walked) = (self.start, self.start_time, 0);
            self.times = &self.times[..walked];
            self.walk(pair, v, |s, p| pair.apply(s, p));
        }
    }
}

/// Walk run `a`, and run `b` (the next, from a state of its own) beside it while both go on,
/// with `pair`'s steps, written out for the runs' shape ([`Pair::apply_shaped`]: an infusion
/// running or not, drug in the depot or not), which no step within a run changes. Two chains
/// of steps are in flight at once, so the walk is not held to the latency of one; `b` stops
/// where either stops (what lies beyond in `b` counts only if `a` is walked to its end).
fn walk_runs<R: Real>(pair: &Pair<R>, a: &mut Run<R>, b: Option<&mut Run<R>>, v: R) {
    let depot = |run: &Run<R>| run.start.depot.val() != 0.0;
    match (pair.infusing(), depot(a), b.as_ref().map_or(depot(a), |b| depot(b))) {
        (false, false, false) => walk_shaped(pair, a, b, v, |s, p| pair.apply_shaped::<false, false>(s, p)),
        (true, false, false) => walk_shaped(pair, a, b, v, |s, p| pair.apply_shaped::<true, false>(s, p)),
        (false, true, true) => walk_shaped(pair, a, b, v, |s, p| pair.apply_shaped::<false, true>(s, p)),
        (true, true, true) => walk_shaped(pair, a, b, v, |s, p| pair.apply_shaped::<true, true>(s, p)),
        _ => walk_shaped(pair, a, b, v, |s, p| pair.apply(s, p)),
    }
}

/// [`walk_runs`] with the steps of one shape.
#[inline(always)]
fn walk_shaped<R: Real>(
    pair: &Pair<R>,
    a: &mut Run<R>,
    b: Option<&mut Run<R>>,
    v: R,
    step: impl Fn(State<R>, usize) -> State<R> + Copy,
) {
    let Some(b) = b else {
        a.walk(pair, v, step);
        a.walk_again_if_emptied(pair, v);
        return;
    };
    let both = a.times.len().min(b.times.len());
    let (mut x, mut y) = ((a.state, a.time, a.last), (b.state, b.time, b.last));
    let mut walked = 0;
    let outs = a.out[..both].iter_mut().zip(&mut b.out[..both]);
    for ((&s, &t), (c, d)) in a.times[..both].iter().zip(&b.times[..both]).zip(outs) {
        let (Some(p), Some(q)) = (pair.place(s - x.1), pair.place(t - y.1)) else { break };
        (x.0, y.0) = (step(x.0, p), step(y.0, q));
        (*c, *d) = (x.0.central / v, y.0.central / v);
        (x.1, x.2, y.1, y.2, walked) = (s, p, t, q, walked + 1);
    }
    ((a.state, a.time, a.last), (b.state, b.time, b.last)) = (x, y);
    (a.walked, b.walked) = (walked, walked);
    a.walk(pair, v, step);
    if a.walked == a.times.len() {
        b.walk(pair, v, step);
    }
    a.walk_again_if_emptied(pair, v);
    b.walk_again_if_emptied(pair, v);
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
    let mut out = vec![R::cst(0.0); times.len()];
    if predict(kin, &events, times, &mut out) {
        return out;
    }
    let mut order: Vec<usize> = (0..times.len()).collect();
    order.sort_by(|&a, &b| times[a].total_cmp(&times[b]));
    let sorted: Vec<f64> = order.iter().map(|&i| times[i]).collect();
    let mut values = vec![R::cst(0.0); times.len()];
    predict(kin, &events, &sorted, &mut values);
    for (i, v) in order.into_iter().zip(values) {
        out[i] = v;
    }
    out
}

/// Concentrations at `times` into `out` (as long), for an event list built once; `false` (with
/// `out` unfinished) when the times do not ascend, equal neighbours allowed (a NaN does not
/// ascend). The walk tells it as it goes: a step of the grid loop has a positive length, and
/// the other times are compared with the one before.
pub(crate) fn predict<R: Real>(kin: Kinetics<R>, events: &Events, times: &[f64], out: &mut [R]) -> bool {
    debug_assert_eq!(times.len(), out.len());
    let mut walker = Walker::new(kin, events, events.walk_start(times)).without_auc();
    let mut at = 0;
    while let Some(&t) = times.get(at) {
        if at > 0 && times[at - 1].partial_cmp(&t).is_none_or(std::cmp::Ordering::is_gt) {
            return false;
        }
        walker.run_to(t);
        out[at] = walker.concentration();
        at += 1;
        at += walker.glide(&times[at..], &mut out[at..]);
    }
    true
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

        /// The grid loop (two runs walked side by side, each in its shape, the states taken
        /// afresh computed ahead) against the walker moving to each time in turn with
        /// [`Walker::run_to`], the step-by-step walk it stands for: the same values bit for bit,
        /// at every point (depots that run out on the way, infusions and ka = k included).
        #[test]
        fn the_grid_loop_gives_the_step_by_step_walks_values_exactly((p, doses, grid) in case()) {
            let events = Events::new(&doses, p.tlag_h);
            let mut walker = Walker::new(Kinetics::from(&p), &events, events.walk_start(&grid)).without_auc();
            let walked = concentrations(&p, &doses, &grid);
            for (i, (&t, got)) in grid.iter().zip(&walked).enumerate() {
                walker.run_to(t);
                let step = walker.concentration();
                prop_assert!(got.to_bits() == step.to_bits(), "point {i} (t = {t} h): grid loop {got}, step by step {step}");
            }
        }
    }
}
