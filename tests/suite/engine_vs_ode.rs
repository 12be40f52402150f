//! The engine against an independent numerical solution of the same model.
//!
//! Reference: the `ode_solvers` crate, version 0.6 (its `Dop853`, the explicit Runge–Kutta
//! method of order 8 of Hairer, Nørsett and Wanner), integrating
//!
//! ```text
//! dA/dt = −k·A + ka·D + R(t),   dD/dt = −ka·D,   dI/dt = A,   dW/dt = A inside [ta, tb)
//! ```
//!
//! piecewise between events, with boluses added to A, oral doses (× F, after the lag time)
//! added to D and infusion rates switched on and off at the event times. The test builds its
//! own breakpoints and active rates from the dose list, so it shares no code with the engine.
//! I/V is the AUC from time 0 and W/V the AUC over one random window.
//!
//! 240 dose histories come from a fixed seed and mix all three routes, irregular (and
//! repeated) dose times, overlapping and very short infusions, ka equal or close to k, lag
//! times, zero doses, and query times in random order, some exactly at dose times.

use crate::common::{assert_rel, rel_err};
use cistern::dosing::{Dose, Route};
use cistern::engine::{Params, auc, concentrations};
use ode_solvers::{Dop853, OutputType, System, Vector4};

/// The issue's bound on the worst relative error against the independent solver.
const TOL: f64 = 1e-8;
/// Concentrations below 1e-15 mg/L (a millionth of a picogram per mL) are essentially zero:
/// they are compared absolutely, to TOL × this floor.
const CONC_FLOOR_MG_L: f64 = 1e-15;
/// The same floor for AUCs (mg·h/L).
const AUC_FLOOR_MG_H_L: f64 = 1e-15;
/// Dop853 tolerances: far tighter than TOL so the reference's own error does not matter.
const ODE_RTOL: f64 = 1e-13;
/// Absolute tolerance on amounts (mg): components below ~1e-17 mg are controlled absolutely.
const ODE_ATOL_MG: f64 = 1e-30;
const CASES: usize = 240;

/// SplitMix64: a tiny deterministic generator, so the cases do not depend on any crate's
/// stream.
struct SplitMix(u64);

impl SplitMix {
    fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in [0, 1).
    fn unit(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 / (1u64 << 53) as f64
    }

    fn uniform(&mut self, lo: f64, hi: f64) -> f64 {
        lo + (hi - lo) * self.unit()
    }

    fn log_uniform(&mut self, lo: f64, hi: f64) -> f64 {
        self.uniform(lo.ln(), hi.ln()).exp()
    }

    fn chance(&mut self, p: f64) -> bool {
        self.unit() < p
    }

    fn below(&mut self, n: usize) -> usize {
        (self.next_u64() % n as u64) as usize
    }
}

/// One random test case.
struct Case {
    params: Params,
    doses: Vec<Dose>,
    times: Vec<f64>,
    window: (f64, f64),
}

fn random_case(rng: &mut SplitMix) -> Case {
    let cl = rng.log_uniform(0.3, 30.0);
    let v = rng.log_uniform(3.0, 300.0);
    let k = cl / v;
    let ka = match rng.below(6) {
        0 => k,
        1 | 2 => {
            let eps = rng.log_uniform(1e-12, 1e-4);
            k * if rng.chance(0.5) { 1.0 + eps } else { 1.0 - eps }
        }
        _ => rng.log_uniform(0.05, 20.0),
    };
    let f = rng.uniform(0.2, 1.0);
    let tlag = if rng.chance(0.5) { 0.0 } else { rng.uniform(0.0, 3.0) };
    let params = Params { cl_l_h: cl, v_l: v, ka_per_h: Some(ka), f, tlag_h: tlag };

    let n = 1 + rng.below(15);
    let mut t = rng.uniform(0.0, 10.0);
    let mut doses = Vec::with_capacity(n);
    for _ in 0..n {
        let route = [Route::Bolus, Route::Infusion, Route::Oral][rng.below(3)];
        let duration_h = match route {
            Route::Infusion if rng.chance(0.25) => rng.log_uniform(1e-9, 1e-3),
            Route::Infusion => rng.uniform(0.1, 30.0),
            _ => 0.0,
        };
        let amount_mg = if rng.chance(0.03) { 0.0 } else { rng.log_uniform(1.0, 2000.0) };
        doses.push(Dose { time_h: t, amount_mg, route, duration_h });
        if !rng.chance(0.1) {
            t += rng.log_uniform(0.01, 48.0);
        }
    }
    // Hand the engine the history out of order.
    for i in (1..doses.len()).rev() {
        doses.swap(i, rng.below(i + 1));
    }

    let horizon = t + 72.0 + tlag;
    let mut times: Vec<f64> = (0..40).map(|_| rng.uniform(0.0, horizon)).collect();
    for d in &doses {
        times.push(d.time_h);
        if d.route == Route::Infusion {
            times.push(d.time_h + d.duration_h);
        }
        if d.route == Route::Oral {
            times.push(d.time_h + tlag);
        }
    }
    for i in (1..times.len()).rev() {
        times.swap(i, rng.below(i + 1));
    }
    let a = rng.uniform(0.0, horizon);
    let b = rng.uniform(0.0, horizon);
    Case { params, doses, times, window: (a.min(b), a.max(b)) }
}

/// Right-hand side of the model on one interval without events.
#[derive(Clone, Copy)]
struct Rhs {
    k: f64,
    ka: f64,
    rate: f64,
    in_window: bool,
}

impl System<f64, Vector4<f64>> for Rhs {
    fn system(&self, _t: f64, y: &Vector4<f64>, dy: &mut Vector4<f64>) {
        dy[0] = -self.k * y[0] + self.ka * y[1] + self.rate;
        dy[1] = -self.ka * y[1];
        dy[2] = y[0];
        dy[3] = if self.in_window { y[0] } else { 0.0 };
    }
}

/// Reference concentrations at `times` and AUCs from 0 to each time, plus the window AUC.
struct Reference {
    conc: Vec<f64>,
    auc_from_0: Vec<f64>,
    auc_window: f64,
}

fn reference(case: &Case) -> Reference {
    let p = &case.params;
    let (k, ka) = (p.cl_l_h / p.v_l, p.ka_per_h.expect("every case carries ka"));
    let (ta, tb) = case.window;
    // Breakpoints: every instant at which the right-hand side or the state changes, and every
    // requested time.
    let mut breaks = vec![0.0, ta, tb];
    breaks.extend_from_slice(&case.times);
    for d in &case.doses {
        match d.route {
            Route::Bolus => breaks.push(d.time_h),
            Route::Oral => breaks.push(d.time_h + p.tlag_h),
            Route::Infusion => breaks.extend([d.time_h, d.time_h + d.duration_h]),
        }
    }
    breaks.sort_by(f64::total_cmp);
    breaks.dedup();

    // State at each breakpoint, after the jumps applied there (right-continuous).
    let mut y = Vector4::zeros();
    let mut at_break = Vec::with_capacity(breaks.len());
    for (i, &t) in breaks.iter().enumerate() {
        if i > 0 {
            let t0 = breaks[i - 1];
            // The infusions running over [t0, t): started at or before t0, ending after t0.
            // Each gives its whole amount between its start and its end as rounded.
            let rate: f64 = case
                .doses
                .iter()
                .filter(|d| d.route == Route::Infusion && d.time_h <= t0 && d.time_h + d.duration_h > t0)
                .map(|d| d.amount_mg / ((d.time_h + d.duration_h) - d.time_h))
                .sum();
            let rhs = Rhs { k, ka, rate, in_window: ta <= t0 && t0 < tb };
            // Dop853's default controller (safety 0.9, β 0, step factors 0.333–6), but a given
            // first step: its automatic guess divides by the absolute tolerance when a state
            // starts at zero with a non-zero slope (the AUCs) and underflows.
            let first_step = (t - t0).min(0.01 / k.max(ka));
            let mut solver = Dop853::from_param(
                rhs,
                t0,
                t,
                t - t0,
                y,
                ODE_RTOL,
                ODE_ATOL_MG,
                0.9,
                0.0,
                0.333,
                6.0,
                t - t0,
                first_step,
                1_000_000,
                1000,
                OutputType::Sparse,
            );
            solver.integrate().unwrap_or_else(|e| panic!("Dop853 failed on [{t0}, {t}]: {e}"));
            y = *solver.y_out().last().expect("Dop853 returns the final state");
        }
        for d in &case.doses {
            match d.route {
                Route::Bolus if d.time_h == t => y[0] += d.amount_mg,
                Route::Oral if d.time_h + p.tlag_h == t => y[1] += p.f * d.amount_mg,
                _ => {}
            }
        }
        at_break.push(y);
    }
    let state_at =
        |t: f64| at_break[breaks.binary_search_by(|b| b.total_cmp(&t)).expect("t is a breakpoint")];
    Reference {
        conc: case.times.iter().map(|&t| state_at(t)[0] / p.v_l).collect(),
        auc_from_0: case.times.iter().map(|&t| state_at(t)[2] / p.v_l).collect(),
        auc_window: state_at(tb)[3] / p.v_l,
    }
}

/// The worst error seen, and where.
#[derive(Default)]
struct Worst {
    err: f64,
    at: String,
}

impl Worst {
    fn see(&mut self, err: f64, at: impl FnOnce() -> String) {
        if err >= self.err {
            self.err = err;
            self.at = at();
        }
    }
}

#[test]
fn engine_matches_dop853_on_random_histories() {
    let mut rng = SplitMix(0x00C1_57E2_2024);
    let (mut conc_worst, mut auc_worst) = (Worst::default(), Worst::default());
    let mut feature_counts = [0usize; 7];
    let mut checks = 0usize;
    for case_no in 0..CASES {
        let case = random_case(&mut rng);
        let p = &case.params;
        p.validate(&case.doses).expect("generated parameters are valid");
        count_features(&case, &mut feature_counts);

        let want = reference(&case);
        let got = concentrations(p, &case.doses, &case.times);
        for (i, &t) in case.times.iter().enumerate() {
            let err = rel_err(got[i], want.conc[i], CONC_FLOOR_MG_L);
            conc_worst.see(err, || format!("case {case_no}, t = {t} h: {:e} vs {:e}", got[i], want.conc[i]));
            assert_rel(got[i], want.conc[i], TOL, CONC_FLOOR_MG_L, &format!("C, case {case_no}, t = {t} h"));
            let a = auc(p, &case.doses, 0.0, t);
            let err = rel_err(a, want.auc_from_0[i], AUC_FLOOR_MG_H_L);
            auc_worst.see(err, || format!("case {case_no}, AUC(0, {t}): {a:e} vs {:e}", want.auc_from_0[i]));
            assert_rel(a, want.auc_from_0[i], TOL, AUC_FLOOR_MG_H_L, &format!("AUC, case {case_no}, 0..{t}"));
            checks += 2;
        }
        let (ta, tb) = case.window;
        let a = auc(p, &case.doses, ta, tb);
        let err = rel_err(a, want.auc_window, AUC_FLOOR_MG_H_L);
        auc_worst.see(err, || format!("case {case_no}, AUC({ta}, {tb}): {a:e} vs {:e}", want.auc_window));
        assert_rel(a, want.auc_window, TOL, AUC_FLOOR_MG_H_L, &format!("AUC, case {case_no}, {ta}..{tb}"));
        checks += 1;
    }
    eprintln!("engine vs ode_solvers 0.6 Dop853: {CASES} histories, {checks} checks");
    eprintln!("  worst concentration relative error {:e} ({})", conc_worst.err, conc_worst.at);
    eprintln!("  worst AUC relative error {:e} ({})", auc_worst.err, auc_worst.at);
    let names = [
        "bolus",
        "infusion",
        "oral",
        "overlapping infusions",
        "infusion < 1e-3 h",
        "ka within 1e-4 of k",
        "lag time",
    ];
    for (name, n) in names.iter().zip(feature_counts) {
        eprintln!("  cases with {name}: {n}");
        // The mix must really exercise every feature the engine treats specially.
        assert!(n >= 20, "only {n} cases with {name}");
    }
}

/// Count which delicate features a case exercises: routes, overlapping infusions, very short
/// infusions, ka close to k (with oral doses) and lag times (with oral doses).
fn count_features(case: &Case, counts: &mut [usize; 7]) {
    let has = |r: Route| case.doses.iter().any(|d| d.route == r);
    let infusions: Vec<&Dose> = case.doses.iter().filter(|d| d.route == Route::Infusion).collect();
    let overlap = infusions.iter().enumerate().any(|(i, a)| {
        infusions
            .iter()
            .skip(i + 1)
            .any(|b| a.time_h < b.time_h + b.duration_h && b.time_h < a.time_h + a.duration_h)
    });
    let p = &case.params;
    let k = p.cl_l_h / p.v_l;
    let ka = p.ka_per_h.unwrap_or(f64::NAN);
    let flags = [
        has(Route::Bolus),
        has(Route::Infusion),
        has(Route::Oral),
        overlap,
        infusions.iter().any(|d| d.duration_h < 1e-3),
        has(Route::Oral) && (ka / k - 1.0).abs() <= 1e-4,
        has(Route::Oral) && p.tlag_h > 0.0,
    ];
    for (c, f) in counts.iter_mut().zip(flags) {
        *c += usize::from(f);
    }
}
