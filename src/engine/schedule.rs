//! A walk worked out once, for a dose history evaluated at the same times many times over.
//!
//! A fit evaluates its objective thousands of times on one dose history and one set of
//! sampling times (2,500 times for one subject's posterior draws); only the parameters change.
//! What the walker decides without them — the length of every step, the infusion rate over it,
//! where doses enter and where a concentration is read — is recorded here once, with the
//! interval lengths numbered by their distinct values. A usual history repeats few lengths
//! (every one-hour infusion has the same one, regular dosing repeats its gaps), so an
//! evaluation computes the exponential of each distinct length once instead of at every step,
//! then makes the walker's state updates in the walker's order with the walker's arithmetic
//! ([`Propagator`]'s factors and [`advance`], or what `advance` reduces to where no infusion
//! runs or the depot is empty): the concentrations are bit for bit those of
//! [`super::predict`].

use super::kernel::{Factors, Propagator, Rates, State, advance};
use super::scalar::Real;
use super::{Clock, Events, Input, Kinetics};

/// One recorded move of the walk.
#[derive(Debug, Clone, Copy)]
enum Move {
    /// A step over the interval length numbered `length`, with `infused` = rate·length (mg)
    /// when an infusion runs; from the state after the last event when `from_anchor` is set
    /// (the walker takes the state afresh from there every so many steps), else from the
    /// current state.
    Step { length: usize, infused: Option<f64>, from_anchor: bool },
    /// A step over the interval length numbered `length` with no infusion running and the
    /// depot empty (no oral dose yet): [`advance`] reduces to the decay of the central amount,
    /// the usual step of an intravenous history, made without the general step's tests.
    Decay { length: usize },
    /// The same with an infusion running: the decay plus φ1·`infused`, as [`advance`] adds it.
    Infuse { length: usize, infused: f64 },
    /// A bolus or oral dose enters.
    Dose(Input),
    /// The state after the events at one time is kept, for the steps taken from it (recorded
    /// only when the walk has such steps).
    Anchor,
    /// A concentration is read.
    Read,
}

/// Factors of up to this many distinct lengths are kept on the stack during an evaluation (a
/// sparse history has a handful); more go to the heap.
const ON_STACK: usize = 16;

/// A distinct interval length and which of its factors the walk needs.
#[derive(Debug, Clone, Copy)]
struct Length {
    hours: f64,
    /// An infusion runs over some step of this length (φ1 is needed).
    infusing: bool,
    /// The depot may hold drug over some step of this length (G and e^(−ka t) are needed).
    absorbing: bool,
}

/// The walk through one dose history to ascending sampling times.
#[derive(Debug, Clone)]
pub(crate) struct Schedule {
    /// The distinct interval lengths, ascending.
    lengths: Vec<Length>,
    moves: Vec<Move>,
}

impl Schedule {
    /// Record the walk through `events` to the ascending `times`, as
    /// [`super::predict`] makes it.
    pub fn new(events: &Events, times: &[f64]) -> Self {
        let start = events.walk_start(times);
        let mut clock = Clock::new(events.from(start), start);
        // Steps are recorded with their lengths in hours, numbered once all are known.
        let mut steps: Vec<Length> = Vec::new();
        let mut moves = Vec::with_capacity(2 * (events.list.len() + times.len()));
        let mut absorbing = false;
        let mut step_to = |clock: &mut Clock, to: f64, absorbing: bool, moves: &mut Vec<Move>| {
            if let Some(step) = clock.step_to(to) {
                let hours = step.from_anchor.unwrap_or(step.dt);
                let infused = (step.rate != 0.0).then_some(step.rate * hours);
                steps.push(Length { hours, infusing: infused.is_some(), absorbing });
                let (length, from_anchor) = (steps.len() - 1, step.from_anchor.is_some());
                moves.push(match infused {
                    _ if from_anchor || absorbing => Move::Step { length, infused, from_anchor },
                    None => Move::Decay { length },
                    Some(infused) => Move::Infuse { length, infused },
                });
            }
        };
        for &t in times {
            while let Some((te, input)) = clock.event_until(t) {
                step_to(&mut clock, te, absorbing, &mut moves);
                clock.take(input);
                absorbing |= matches!(input, Input::Depot(_));
                if matches!(input, Input::Bolus(_) | Input::Depot(_)) {
                    moves.push(Move::Dose(input));
                }
                moves.push(Move::Anchor);
            }
            step_to(&mut clock, t, absorbing, &mut moves);
            moves.push(Move::Read);
        }
        if !moves.iter().any(|m| matches!(m, Move::Step { from_anchor: true, .. })) {
            moves.retain(|m| !matches!(m, Move::Anchor));
        }
        let mut lengths = steps.clone();
        lengths.sort_by(|a, b| a.hours.total_cmp(&b.hours));
        lengths.dedup_by(|a, b| {
            let same = a.hours.total_cmp(&b.hours).is_eq();
            if same {
                b.infusing |= a.infusing;
                b.absorbing |= a.absorbing;
            }
            same
        });
        for m in &mut moves {
            if let Move::Step { length, .. } | Move::Decay { length } | Move::Infuse { length, .. } = m {
                let hours = steps[*length].hours;
                *length = lengths.binary_search_by(|x| x.hours.total_cmp(&hours)).unwrap_or(0);
            }
        }
        Schedule { lengths, moves }
    }

    /// The concentration (mg/L) at each of the sampling times under `kin`, handed to `each` in
    /// order.
    pub fn run<R: Real>(&self, kin: Kinetics<R>, each: impl FnMut(R)) {
        let rates = Rates { k: kin.k, ka: kin.ka };
        let zero = R::cst(0.0);
        let unset = Factors { e: zero, p1: zero, g: zero, ea: zero };
        let mut on_stack = [unset; ON_STACK];
        let mut on_heap = Vec::new();
        let factors: &mut [Factors<R>] = if self.lengths.len() <= ON_STACK {
            &mut on_stack[..self.lengths.len()]
        } else {
            on_heap.resize(self.lengths.len(), unset);
            &mut on_heap
        };
        for (f, l) in factors.iter_mut().zip(&self.lengths) {
            *f = l.factors(rates);
        }
        let state = State::empty();
        self.walk(&mut One { kin, factors, state, anchor: state, each });
    }

    /// [`Schedule::run`] for `LANES` parameter sets at once, each lane's concentrations bit for
    /// bit those of `run` on its own: the moves are looked at once for all lanes, and each
    /// lane's arithmetic is `run`'s. `each` receives the lanes' concentrations at each time;
    /// `room` holds the lanes' factors (kept by the caller for the next call).
    pub fn run_lanes<const LANES: usize>(
        &self,
        kin: &[Kinetics<f64>; LANES],
        room: &mut LaneFactors<LANES>,
        each: impl FnMut([f64; LANES]),
    ) {
        let factors = &mut room.0;
        factors.resize(self.lengths.len(), FactorLanes::default());
        for (lanes, l) in factors.iter_mut().zip(&self.lengths) {
            for (i, k) in kin.iter().enumerate() {
                lanes.set(i, l.factors(Rates { k: k.k, ka: k.ka }));
            }
        }
        let zero = [0.0; LANES];
        let (central, depot) = (zero, zero);
        self.walk(&mut Lanes { kin, factors, central, depot, anchor: (central, depot), each });
    }

    /// Make the recorded moves on `carrier`.
    #[inline(always)]
    fn walk(&self, carrier: &mut impl Carrier) {
        for m in &self.moves {
            match *m {
                Move::Step { length, infused, from_anchor } => carrier.step(length, infused, from_anchor),
                Move::Decay { length } => carrier.decay(length),
                Move::Infuse { length, infused } => carrier.infuse(length, infused),
                Move::Dose(input) => carrier.dose(input),
                Move::Anchor => carrier.anchor(),
                Move::Read => carrier.read(),
            }
        }
    }
}

impl Length {
    /// The factors the walk needs over this length under `rates`.
    #[inline(always)]
    fn factors<R: Real>(&self, rates: Rates<R>) -> Factors<R> {
        Propagator::new(rates, self.hours).factors(rates, self.infusing, self.absorbing)
    }
}

/// The lanes' factors of each distinct length, for [`Schedule::run_lanes`]: kept from call to
/// call, so that a batch of evaluations allocates them once.
#[derive(Debug, Default)]
pub(crate) struct LaneFactors<const LANES: usize>(Vec<FactorLanes<LANES>>);

/// One length's [`Factors`] in every lane, each factor's lanes side by side, so that a move
/// made in every lane is a few packed operations.
#[derive(Debug, Clone, Copy)]
struct FactorLanes<const LANES: usize> {
    e: [f64; LANES],
    p1: [f64; LANES],
    g: [f64; LANES],
    ea: [f64; LANES],
}

impl<const LANES: usize> Default for FactorLanes<LANES> {
    fn default() -> Self {
        let zero = [0.0; LANES];
        FactorLanes { e: zero, p1: zero, g: zero, ea: zero }
    }
}

impl<const LANES: usize> FactorLanes<LANES> {
    #[inline(always)]
    fn set(&mut self, lane: usize, f: Factors<f64>) {
        (self.e[lane], self.p1[lane], self.g[lane], self.ea[lane]) = (f.e, f.p1, f.g, f.ea);
    }

    #[inline(always)]
    fn get(&self, lane: usize) -> Factors<f64> {
        Factors { e: self.e[lane], p1: self.p1[lane], g: self.g[lane], ea: self.ea[lane] }
    }
}

/// What the recorded moves act on: one parameter set's state ([`One`]), or several sets'
/// together ([`Lanes`]). Lengths are numbered as in [`Schedule::lengths`].
trait Carrier {
    fn step(&mut self, length: usize, infused: Option<f64>, from_anchor: bool);
    fn decay(&mut self, length: usize);
    fn infuse(&mut self, length: usize, infused: f64);
    fn dose(&mut self, input: Input);
    fn anchor(&mut self);
    fn read(&mut self);
}

/// One parameter set, in any number type.
struct One<'a, R, E> {
    kin: Kinetics<R>,
    factors: &'a [Factors<R>],
    state: State<R>,
    anchor: State<R>,
    each: E,
}

/// The walker's state update of one lane (see [`advance`]).
#[inline(always)]
fn step<R: Real>(from: State<R>, ka: R, f: &Factors<R>, infused: Option<f64>) -> State<R> {
    advance(from, ka, f.e, infused.map(|x| f.p1 * x), || (f.g, f.ea))
}

/// The central amount after a step with an infusion running and the depot empty (decay `e`,
/// φ1 `p1`): what [`advance`] reduces to there.
#[inline(always)]
fn infuse<R: Real>(central: R, e: R, p1: R, infused: f64) -> R {
    central * e + p1 * infused
}

impl<R: Real, E: FnMut(R)> Carrier for One<'_, R, E> {
    #[inline(always)]
    fn step(&mut self, length: usize, infused: Option<f64>, from_anchor: bool) {
        let from = if from_anchor { self.anchor } else { self.state };
        self.state = step(from, self.kin.ka, &self.factors[length], infused);
    }
    #[inline(always)]
    fn decay(&mut self, length: usize) {
        self.state.central = self.state.central * self.factors[length].e;
    }
    #[inline(always)]
    fn infuse(&mut self, length: usize, infused: f64) {
        let f = &self.factors[length];
        self.state.central = infuse(self.state.central, f.e, f.p1, infused);
    }
    #[inline(always)]
    fn dose(&mut self, input: Input) {
        input.enter(&mut self.state, self.kin.f);
    }
    #[inline(always)]
    fn anchor(&mut self) {
        self.anchor = self.state;
    }
    #[inline(always)]
    fn read(&mut self) {
        (self.each)(self.state.central / self.kin.v);
    }
}

/// `LANES` parameter sets in plain numbers, each lane with [`One`]'s arithmetic; the lanes'
/// amounts side by side, as their factors ([`FactorLanes`]).
struct Lanes<'a, const LANES: usize, E> {
    kin: &'a [Kinetics<f64>; LANES],
    factors: &'a [FactorLanes<LANES>],
    central: [f64; LANES],
    depot: [f64; LANES],
    anchor: ([f64; LANES], [f64; LANES]),
    each: E,
}

impl<const LANES: usize, E: FnMut([f64; LANES])> Carrier for Lanes<'_, LANES, E> {
    #[inline(always)]
    fn step(&mut self, length: usize, infused: Option<f64>, from_anchor: bool) {
        let (central, depot) = if from_anchor { self.anchor } else { (self.central, self.depot) };
        let f = &self.factors[length];
        for i in 0..LANES {
            let next =
                step(State { central: central[i], depot: depot[i] }, self.kin[i].ka, &f.get(i), infused);
            (self.central[i], self.depot[i]) = (next.central, next.depot);
        }
    }
    #[inline(always)]
    fn decay(&mut self, length: usize) {
        let f = &self.factors[length];
        for i in 0..LANES {
            self.central[i] *= f.e[i];
        }
    }
    #[inline(always)]
    fn infuse(&mut self, length: usize, infused: f64) {
        let f = &self.factors[length];
        for i in 0..LANES {
            self.central[i] = infuse(self.central[i], f.e[i], f.p1[i], infused);
        }
    }
    #[inline(always)]
    fn dose(&mut self, input: Input) {
        for i in 0..LANES {
            let mut s = State { central: self.central[i], depot: self.depot[i] };
            input.enter(&mut s, self.kin[i].f);
            (self.central[i], self.depot[i]) = (s.central, s.depot);
        }
    }
    #[inline(always)]
    fn anchor(&mut self) {
        self.anchor = (self.central, self.depot);
    }
    #[inline(always)]
    fn read(&mut self) {
        (self.each)(std::array::from_fn(|i| self.central[i] / self.kin[i].v));
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dosing::{Dose, Route};
    use crate::engine::predict;
    use crate::engine::scalar::Dual;
    use proptest::prelude::*;
    use proptest::test_runner::RngSeed;

    use crate::engine::strategies::{log_uniform, route};

    prop_compose! {
        /// A sparse history: 1–20 doses of every route on a 12-h or irregular schedule with
        /// times on a quarter-hour grid (so lengths repeat, as in practice) or anywhere,
        /// infusions of 0.5–2 h, an oral lag of 0–2 h; 1–6 sampling times, or a dense run of
        /// 70–200 between two doses (past the walker's re-anchoring every 64 steps).
        fn case()(k in log_uniform(0.005, 5.0), v in log_uniform(3.0, 300.0),
                  ratio in prop_oneof![3 => log_uniform(0.01, 100.0), 1 => Just(1.0)],
                  f in 0.2..=1.0, tlag in prop_oneof![Just(0.0), 0.0..2.0],
                  grid in any::<bool>(),
                  doses in prop::collection::vec((0u32..4, log_uniform(1.0, 2000.0), route(),
                                                  prop_oneof![Just(1.0), 0.5..2.0]), 1..20),
                  sparse in prop::collection::vec(0.0..300.0, 1..7),
                  dense in prop_oneof![3 => Just(0usize), 1 => 70usize..200])
                  -> (Kinetics<f64>, Vec<Dose>, Vec<f64>) {
            let kin = Kinetics { k, v, ka: ratio * k, f, tlag_h: tlag };
            let doses: Vec<Dose> = doses.into_iter().enumerate().map(|(i, (jitter, amount_mg, route, d))| {
                let time_h = if grid { i as f64 * 12.0 + f64::from(jitter) * 0.25 } else { i as f64 * 11.3 + f64::from(jitter) * 0.37 };
                Dose { time_h, amount_mg, route, duration_h: if route == Route::Infusion { d } else { 0.0 } }
            }).collect();
            let mut times: Vec<f64> = sparse.into_iter().map(|t: f64| if grid { (t * 4.0).round() / 4.0 } else { t }).collect();
            times.extend((0..dense).map(|i| 3.0 + i as f64 * 0.05));
            times.sort_by(f64::total_cmp);
            (kin, doses, times)
        }
    }

    fn dual(kin: &Kinetics<f64>) -> Kinetics<Dual<3>> {
        Kinetics {
            k: Dual::var(kin.k, 0),
            v: Dual::var(kin.v, 1),
            ka: Dual::var(kin.ka, 2),
            f: Dual::cst(kin.f),
            tlag_h: kin.tlag_h,
        }
    }

    proptest! {
        #![proptest_config(ProptestConfig {
            cases: 500,
            rng_seed: RngSeed::Fixed(0x5EED_0015),
            failure_persistence: None,
            ..ProptestConfig::default()
        })]

        /// The recorded walk against the general engine (the walker stepping from event to
        /// event, each step's factors computed afresh when its length changes): the same
        /// concentrations bit for bit, and the same derivatives on dual numbers.
        #[test]
        fn the_schedule_gives_the_walkers_values_exactly((kin, doses, times) in case()) {
            let events = Events::new(&doses, kin.tlag_h);
            let schedule = Schedule::new(&events, &times);
            let (mut general, mut recorded) = (vec![0.0; times.len()], Vec::new());
            prop_assert!(predict(kin, &events, &times, &mut general));
            schedule.run(kin, |c| recorded.push(c));
            prop_assert_eq!(general.len(), times.len());
            for (i, (g, r)) in general.iter().zip(&recorded).enumerate() {
                prop_assert!(g.to_bits() == r.to_bits(), "time {} h: general {g}, schedule {r}", times[i]);
            }
            let (mut general, mut recorded) = (vec![Dual::cst(0.0); times.len()], Vec::new());
            prop_assert!(predict(dual(&kin), &events, &times, &mut general));
            schedule.run(dual(&kin), |c| recorded.push(c));
            prop_assert_eq!(general.len(), recorded.len());
            for (g, r) in general.iter().zip(&recorded) {
                prop_assert!(g.v.to_bits() == r.v.to_bits() && (0..3).all(|i| g.d[i].to_bits() == r.d[i].to_bits()), "general {g:?}, schedule {r:?}");
            }
        }

        /// Lanes walked together against each lane's own walk: bit for bit, with lanes whose
        /// rates differ (the depot may empty to zero in one lane and not in another).
        #[test]
        fn lanes_give_each_lanes_own_values_exactly((kin, doses, times) in case(), scale in log_uniform(0.05, 20.0)) {
            let events = Events::new(&doses, kin.tlag_h);
            let schedule = Schedule::new(&events, &times);
            let lanes: [Kinetics<f64>; 4] = [
                kin,
                Kinetics { k: kin.k * scale, ..kin },
                Kinetics { ka: kin.ka / scale, v: kin.v * 1.7, ..kin },
                Kinetics { k: kin.k / scale, ka: kin.ka * scale, f: 1.0, ..kin },
            ];
            let mut together = Vec::new();
            let mut room = LaneFactors::default();
            for _ in 0..2 {
                together.clear();
                schedule.run_lanes(&lanes, &mut room, |c| together.push(c));
            }
            for (lane, kin) in lanes.iter().enumerate() {
                let mut alone = Vec::new();
                schedule.run(*kin, |c| alone.push(c));
                prop_assert_eq!(alone.len(), together.len());
                for (a, t) in alone.iter().zip(&together) {
                    prop_assert!(a.to_bits() == t[lane].to_bits(), "lane {}: alone {a}, together {}", lane, t[lane]);
                }
            }
        }
    }
}
