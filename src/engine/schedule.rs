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
    pub fn run<R: Real>(&self, kin: Kinetics<R>, mut each: impl FnMut(R)) {
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
            *f = Propagator::new(rates, l.hours).factors(rates, l.infusing, l.absorbing);
        }
        let mut state = State::empty();
        let mut anchor = state;
        for m in &self.moves {
            match *m {
                Move::Step { length, infused, from_anchor } => {
                    let f = &factors[length];
                    let from = if from_anchor { anchor } else { state };
                    state = advance(from, kin.ka, f.e, infused.map(|x| f.p1 * x), || (f.g, f.ea));
                }
                Move::Decay { length } => state.central = state.central * factors[length].e,
                Move::Infuse { length, infused } => {
                    let f = &factors[length];
                    state.central = state.central * f.e + f.p1 * infused;
                }
                Move::Dose(input) => input.enter(&mut state, kin.f),
                Move::Anchor => anchor = state,
                Move::Read => each(state.central / kin.v),
            }
        }
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
    }
}
