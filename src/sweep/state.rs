//! The mergeable state of a sweep: what was swept (the setup) and integer counts per regimen.
//!
//! A shard writes its state as JSON; `merge` checks that the states share one setup and hold
//! no slice of the subjects twice, and adds their counts, into a state that `merge` reads again
//! (so shards merge in stages) and, once it covers every slice, the summary. Counts and sketches are
//! integers, so the merged state is identical to the state of one unsharded run, and so is the
//! summary made from it. Floating-point values in the state are JSON numbers in their shortest
//! round-trip form, read back with serde_json's correctly rounded parser (its
//! `float_roundtrip` feature), so they survive the trip exactly.

use super::sketch::{RELATIVE_ERROR, Sketch};
use crate::dosing::Regimen;
use crate::io::digest::sha256_hex;
use crate::plan::dose_limits_broken;
use crate::plan::targets::{Limits, Target};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::ops::Range;

/// The `format` field of a state file.
pub const STATE_FORMAT: &str = "cistern sweep state";
/// The layout version of a state file (3: the shards a state covers, each with a digest of
/// its per-subject rows, so that merged states merge again and parts are checked before they
/// are joined; the build identifier in the setup).
pub const STATE_VERSION: u32 = 3;

/// This build's identifier: a digest of the package's sources and the target platform
/// (build.rs).
pub const BUILD: &str = env!("CISTERN_BUILD");

/// One candidate regimen as swept, with the dose limits it breaks by itself.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SweptRegimen {
    /// The regimen.
    #[serde(flatten)]
    pub regimen: Regimen,
    /// The dose limits the regimen breaks by itself, as reasons.
    pub dose_limits_broken: Vec<String>,
}

/// Everything that determines a sweep's results. Shards merge only when their setups are equal.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Setup {
    /// The program version that computed the counts.
    pub cistern_version: String,
    /// The build that computed them ([`BUILD`]): builds of one version may differ.
    pub cistern_build: String,
    /// The population: its source files' fingerprints and how covariates were drawn. Text,
    /// whole numbers and null only (no floats), so that it reads back exactly.
    pub population: serde_json::Value,
    /// The seed of every subject's draws.
    pub seed: u64,
    /// Subjects in the whole sweep (all shards).
    pub subjects: u64,
    /// The targets, as stated.
    pub targets: Vec<String>,
    /// The safety limits.
    pub limits: Limits,
    /// The candidate regimens, in order.
    pub regimens: Vec<SweptRegimen>,
    /// Relative error of the percentiles.
    pub percentile_relative_error: f64,
}

impl Setup {
    /// The setup of a sweep; `population` describes the population's source.
    pub fn new(
        population: serde_json::Value,
        seed: u64,
        subjects: u64,
        candidates: &[Regimen],
        targets: &[Target],
        limits: &Limits,
    ) -> Setup {
        Setup {
            cistern_version: env!("CARGO_PKG_VERSION").to_string(),
            cistern_build: BUILD.to_string(),
            population,
            seed,
            subjects,
            targets: targets.iter().map(Target::to_string).collect(),
            limits: *limits,
            regimens: candidates
                .iter()
                .map(|c| SweptRegimen {
                    regimen: *c,
                    dose_limits_broken: dose_limits_broken(c, None, limits),
                })
                .collect(),
            percentile_relative_error: RELATIVE_ERROR,
        }
    }

    /// The setup's fingerprint (SHA-256 of its JSON), to tell sweeps apart at a glance.
    pub fn fingerprint(&self) -> String {
        sha256_hex(serde_json::to_string(self).unwrap_or_default().as_bytes())
    }

    /// The names of the top-level fields in which two setups differ.
    fn differences(&self, other: &Setup) -> Vec<String> {
        let as_map = |s: &Setup| -> BTreeMap<String, serde_json::Value> {
            serde_json::from_value(serde_json::to_value(s).unwrap_or_default()).unwrap_or_default()
        };
        let (a, b) = (as_map(self), as_map(other));
        a.keys().filter(|k| a.get(*k) != b.get(*k)).cloned().collect()
    }
}

/// Counts for one regimen over some subjects.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct Tally {
    /// Subjects counted.
    pub subjects: u64,
    /// Subjects meeting every target.
    pub meets: u64,
    /// Subjects above the peak limit (`None` without a limit).
    pub over_peak: Option<u64>,
    /// Subjects above the trough limit (`None` without a limit).
    pub over_trough: Option<u64>,
    /// Steady-state troughs (mg/L).
    pub trough_mg_l: Sketch,
    /// Steady-state peaks (mg/L).
    pub peak_mg_l: Sketch,
    /// Steady-state AUC over 24 h (mg·h/L).
    pub auc24_mg_h_l: Sketch,
}

impl Tally {
    /// An empty tally, counting the exposure limits that are set.
    pub fn new(limits: &Limits) -> Tally {
        Tally {
            over_peak: limits.max_peak_mg_l.map(|_| 0),
            over_trough: limits.max_trough_mg_l.map(|_| 0),
            ..Tally::default()
        }
    }

    /// Add the counts of `subjects` more subjects (their values are counted in the sketches
    /// directly).
    pub(super) fn add(&mut self, subjects: u64, meets: u64, over_peak: u64, over_trough: u64) {
        self.subjects += subjects;
        self.meets += meets;
        if let Some(n) = &mut self.over_peak {
            *n += over_peak;
        }
        if let Some(n) = &mut self.over_trough {
            *n += over_trough;
        }
    }

    /// Whether a tally read from a file is internally consistent.
    fn is_sound(&self) -> bool {
        let within = |n: Option<u64>| n.is_none_or(|n| n <= self.subjects);
        self.meets <= self.subjects
            && within(self.over_peak)
            && within(self.over_trough)
            && [&self.trough_mg_l, &self.peak_mg_l, &self.auc24_mg_h_l].iter().all(|s| s.holds(self.subjects))
    }

    fn merge(&mut self, other: &Tally) {
        self.subjects += other.subjects;
        self.meets += other.meets;
        self.over_peak = self.over_peak.zip(other.over_peak).map(|(a, b)| a + b);
        self.over_trough = self.over_trough.zip(other.over_trough).map(|(a, b)| a + b);
        self.trough_mg_l.merge(&other.trough_mg_l);
        self.peak_mg_l.merge(&other.peak_mg_l);
        self.auc24_mg_h_l.merge(&other.auc24_mg_h_l);
    }
}

/// The I-th of N contiguous slices of the subjects.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct Shard {
    /// I, from 1.
    pub index: u64,
    /// N.
    pub count: u64,
}

impl Shard {
    /// The whole sweep as one shard.
    pub const WHOLE: Shard = Shard { index: 1, count: 1 };

    /// Parse `I/N` with 1 ≤ I ≤ N.
    pub fn parse(text: &str) -> Result<Shard, String> {
        let parsed =
            text.split_once('/').and_then(|(i, n)| Some((i.trim().parse().ok()?, n.trim().parse().ok()?)));
        let Some((index, count)) = parsed else {
            return Err(format!(
                "expected I/N with whole numbers, e.g. 3/8 (the 3rd of 8 shards), found '{text}'"
            ));
        };
        if count == 0 {
            return Err(format!("the number of shards N must be at least 1, found '{text}'"));
        }
        if !(1..=count).contains(&index) {
            return Err(format!("the shard I must be between 1 and N = {count}, found '{text}'"));
        }
        Ok(Shard { index, count })
    }

    /// This shard's subjects (0-based, half-open) out of `total`: the slices
    /// ⌊(I−1)·total/N⌋ .. ⌊I·total/N⌋ are disjoint and cover every subject.
    pub fn span(&self, total: u64) -> Range<u64> {
        let edge = |i: u64| (u128::from(i) * u128::from(total) / u128::from(self.count)) as u64;
        edge(self.index - 1)..edge(self.index)
    }
}

/// What a shard wrote with `--per-subject`: enough to check a part file before it is joined.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct RowsWritten {
    /// Data rows (subjects × regimens), the header not counted.
    pub rows: u64,
    /// SHA-256 of the file's bytes, header included.
    pub sha256: String,
}

/// One shard that a state covers.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Part {
    /// The shard I (from 1) of the state's N.
    pub shard: u64,
    /// Its subjects, 0-based and half-open: [from, to).
    pub subjects_from: u64,
    /// End of its subjects (exclusive).
    pub subjects_to: u64,
    /// Its per-subject rows, when it wrote them.
    pub rows: Option<RowsWritten>,
}

impl Part {
    /// Its subjects as the per-subject file numbers them (from 1), for messages.
    pub fn described(&self, shards: u64) -> String {
        format!("shard {}/{shards} (subjects {}–{})", self.shard, self.subjects_from + 1, self.subjects_to)
    }
}

/// A sweep's state over some of its shards: one shard as `sweep --shard` writes it, several
/// as `merge --state-out` writes them, or the whole sweep.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SweepState {
    /// Always [`STATE_FORMAT`].
    pub format: String,
    /// Always [`STATE_VERSION`].
    pub version: u32,
    /// [`Setup::fingerprint`].
    pub fingerprint: String,
    /// What was swept.
    pub setup: Setup,
    /// N: how many shards the subjects were split into.
    pub shards: u64,
    /// The shards this state covers, in shard order.
    pub parts: Vec<Part>,
    /// Counts per regimen over the parts' subjects, in the setup's order.
    pub tallies: Vec<Tally>,
}

impl SweepState {
    /// The state of `shard` of the sweep `setup`, with its counts and, when it wrote them, its
    /// per-subject rows.
    pub fn new(setup: Setup, shard: Shard, tallies: Vec<Tally>, rows: Option<RowsWritten>) -> SweepState {
        let span = shard.span(setup.subjects);
        SweepState {
            format: STATE_FORMAT.to_string(),
            version: STATE_VERSION,
            fingerprint: setup.fingerprint(),
            setup,
            shards: shard.count,
            parts: vec![Part { shard: shard.index, subjects_from: span.start, subjects_to: span.end, rows }],
            tallies,
        }
    }

    /// Write the state as one line of JSON.
    pub fn write(&self, out: &mut dyn std::io::Write) -> std::io::Result<()> {
        serde_json::to_writer(&mut *out, self)?;
        writeln!(out)
    }

    /// The shards of the sweep this state does not cover.
    pub fn missing(&self) -> Vec<u64> {
        let covered: std::collections::BTreeSet<u64> = self.parts.iter().map(|p| p.shard).collect();
        (1..=self.shards).filter(|i| !covered.contains(i)).collect()
    }

    /// Refuses a state that does not cover every shard (the summary and the per-subject file
    /// need the whole sweep).
    pub fn complete(&self) -> Result<(), String> {
        let missing = self.missing();
        if missing.is_empty() {
            return Ok(());
        }
        let n = self.shards;
        let listed: Vec<String> = missing.iter().map(|i| format!("{i}/{n}")).collect();
        Err(format!("shards missing: {} (each of the {n} shards is needed once)", listed.join(", ")))
    }

    /// Read a state from JSON text.
    pub fn parse(text: &str) -> Result<SweepState, String> {
        let probe: serde_json::Value =
            serde_json::from_str(text).map_err(|e| format!("not a sweep state (JSON): {e}"))?;
        if probe.get("format").and_then(|f| f.as_str()) != Some(STATE_FORMAT) {
            return Err(format!("not a sweep state: expected \"format\": \"{STATE_FORMAT}\""));
        }
        if probe.get("version").and_then(|v| v.as_u64()) != Some(u64::from(STATE_VERSION)) {
            return Err(format!(
                "a sweep state of another version; this program reads version {STATE_VERSION} \
                 (sweep the shards again with this build)"
            ));
        }
        let state: SweepState =
            serde_json::from_value(probe).map_err(|e| format!("a damaged sweep state: {e}"))?;
        if !state.is_consistent() {
            return Err("a damaged sweep state: its counts, shards and setup do not agree".into());
        }
        Ok(state)
    }

    /// Whether a state read from a file agrees with itself: its shards in order, each slice
    /// where the split puts it, rows as many as its subjects and regimens, counts over exactly
    /// those subjects.
    fn is_consistent(&self) -> bool {
        let regimens = self.setup.regimens.len() as u64;
        let part_sound = |p: &Part| {
            (1..=self.shards).contains(&p.shard)
                && (Shard { index: p.shard, count: self.shards }).span(self.setup.subjects)
                    == (p.subjects_from..p.subjects_to)
                && p.rows.as_ref().is_none_or(|r| {
                    (p.subjects_to - p.subjects_from).checked_mul(regimens) == Some(r.rows)
                        && r.sha256.len() == 64
                })
        };
        let parts_sound = !self.parts.is_empty()
            && self.parts.iter().all(part_sound)
            && self.parts.windows(2).all(|w| w[0].shard < w[1].shard);
        if !parts_sound
            || self.fingerprint != self.setup.fingerprint()
            || self.tallies.len() != regimens as usize
        {
            return false;
        }
        // Disjoint slices of the sweep's subjects: the sum cannot overflow.
        let subjects: u64 = self.parts.iter().map(|p| p.subjects_to - p.subjects_from).sum();
        self.tallies.iter().all(|t| t.subjects == subjects && t.is_sound())
    }
}

/// Merges states one at a time (so memory holds one state, not all), refusing states of
/// different setups or splits and shards given twice. The result may cover only some shards:
/// [`SweepState::complete`] tells whether it is the whole sweep.
#[derive(Debug, Default)]
pub struct Merger {
    merged: Option<(String, SweepState)>,
    seen: BTreeMap<u64, String>,
}

impl Merger {
    /// Add the state read from `name`.
    pub fn add(&mut self, name: &str, state: SweepState) -> Result<(), String> {
        let Some((first_name, merged)) = &mut self.merged else {
            self.seen.extend(state.parts.iter().map(|p| (p.shard, name.to_string())));
            self.merged = Some((name.to_string(), state));
            return Ok(());
        };
        if state.fingerprint != merged.fingerprint || state.setup != merged.setup {
            return Err(format!(
                "{name} is a shard of another sweep than {first_name} (they differ in: {}); merge \
                 only the shards of one sweep",
                state.setup.differences(&merged.setup).join(", ")
            ));
        }
        let count = merged.shards;
        if state.shards != count {
            return Err(format!(
                "{name} holds shards of {} but {first_name} holds shards of {count}: the shards must \
                 split the sweep the same way",
                state.shards
            ));
        }
        for part in &state.parts {
            if let Some(other) = self.seen.insert(part.shard, name.to_string()) {
                return Err(format!("shard {}/{count} is given twice: {other} and {name}", part.shard));
            }
        }
        merged.tallies.iter_mut().zip(&state.tallies).for_each(|(t, o)| t.merge(o));
        merged.parts.extend(state.parts);
        merged.parts.sort_by_key(|p| p.shard);
        Ok(())
    }

    /// The merged state of the shards added.
    pub fn finish(self) -> Result<SweepState, String> {
        let Some((_, merged)) = self.merged else {
            return Err("no shard states to merge".into());
        };
        Ok(merged)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dosing::Route;
    use crate::plan::candidates::{Durations, grid};
    use crate::plan::targets::parse_target;

    #[test]
    fn shard_slices_are_disjoint_and_cover_every_subject() {
        for total in [0, 1, 7, 1001, 1 << 40] {
            for count in [1, 2, 3, 8, 13] {
                let mut next = 0;
                for index in 1..=count {
                    let span = Shard { index, count }.span(total);
                    assert_eq!(span.start, next, "{index}/{count} of {total}");
                    next = span.end;
                }
                assert_eq!(next, total);
            }
        }
        assert_eq!(Shard::parse(" 3/8 ").unwrap(), Shard { index: 3, count: 8 });
        for bad in ["5/4", "0/4", "1/0", "a/b", "3", "-1/4", "1/4/2"] {
            assert!(Shard::parse(bad).is_err(), "{bad}");
        }
    }

    #[test]
    fn a_state_reads_back_exactly_even_with_awkward_numbers() {
        // Values whose shortest decimal text has 17 digits.
        let third = 100.0 / 3.0;
        let candidates =
            grid(&[third, 2.0 * third], &[0.1 + 0.2], Route::Bolus, &Durations::Fixed(vec![])).unwrap();
        let limits = Limits { max_peak_mg_l: Some(third), max_risk: 0.07, ..Limits::default() };
        let targets = [parse_target("auc24=0.30000000000000004..").unwrap()];
        let setup = Setup::new(serde_json::json!({"model": "00ff"}), 7, 10, &candidates, &targets, &limits);
        let mut tally = Tally::new(&limits);
        // A consistent tally: ten subjects, each sketch holding ten values.
        tally.subjects = 10;
        for _ in 0..10 {
            tally.trough_mg_l.add(third);
            tally.peak_mg_l.add(third);
            tally.auc24_mg_h_l.add(third);
        }
        let state = SweepState::new(setup, Shard { index: 1, count: 1 }, vec![tally.clone(), tally], None);
        let text = serde_json::to_string(&state).unwrap();
        let back = SweepState::parse(&text).unwrap();
        assert_eq!(back, state);
        assert_eq!(serde_json::to_string(&back).unwrap(), text);
        let damaged = text.replace("\"seed\":7", "\"seed\":8");
        assert!(SweepState::parse(&damaged).unwrap_err().contains("damaged"));
    }
}
