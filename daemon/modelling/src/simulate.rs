//! The simulator: turns a scenario (a tuning description of invented units) into a true model,
//! and draws reproducible datasets from any model — counts from the count distribution, spike
//! times by inverse-transform sampling of the per-bin density, stimuli in balanced random blocks.
//!
//! Seeded ChaCha8 only: the same seed gives the same dataset on every machine.

use auspex_engine::count::{CountFamily, CountParams};
use auspex_engine::data::{Dataset, Trial};
use auspex_engine::model::{CellSpec, CellSummary, Model, ModelSpec};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

/// A unit in a scenario: axis tuning of its count, direction-dependent latency of its response.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ScenarioUnit {
    /// Unit id.
    pub id: u32,
    /// Preferred direction, degrees.
    pub preferred_deg: f64,
    /// Expected spikes in the window orthogonal to the preferred axis.
    pub baseline_count: f64,
    /// Expected spikes in the window along the preferred axis (either direction).
    pub peak_count: f64,
    /// Count family: poisson, negative_binomial or com_poisson.
    pub count_family: String,
    /// Target Fano factor (1 for Poisson; > 1 negative binomial; < 1 COM-Poisson).
    #[serde(default = "one")]
    pub fano: f64,
    /// Response latency (ms) for directions within 90° of the preferred one.
    pub early_ms: f64,
    /// Response latency (ms) for the opposite directions.
    pub late_ms: f64,
    /// Width (standard deviation, ms) of the response.
    pub width_ms: f64,
}

fn one() -> f64 {
    1.0
}

/// A simulated experiment.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Scenario {
    /// Free-text description.
    pub description: String,
    /// Stimulus names with their directions in degrees.
    pub stimuli: Vec<(String, f64)>,
    /// Bin width, ms.
    pub bin_width_ms: f64,
    /// Window after onset, ms.
    pub window_ms: f64,
    /// Trials per stimulus.
    pub trials_per_stimulus: u32,
    /// Gap between one window's end and the next onset, ms: uniform on [min, max].
    pub gap_ms: (f64, f64),
    /// Background firing (Hz) between windows, so some spikes fall in no window.
    pub spontaneous_hz: f64,
    /// Clock ticks per second.
    pub tick_rate_hz: f64,
    /// Random seed.
    pub seed: u64,
    /// Units.
    pub units: Vec<ScenarioUnit>,
}

/// Why a scenario is unusable.
#[derive(Debug, thiserror::Error)]
pub enum ScenarioError {
    /// Out-of-range or inconsistent values.
    #[error("scenario: {0}")]
    Invalid(String),
    /// The derived model is invalid.
    #[error("scenario: {0}")]
    Model(#[from] auspex_engine::model::ModelError),
}

fn gauss_bins(n_bins: usize, bin_ms: f64, centre_ms: f64, width_ms: f64) -> Vec<f64> {
    use statrs::function::erf::erf;
    let cdf = |x: f64| 0.5 * (1.0 + erf((x - centre_ms) / (width_ms * std::f64::consts::SQRT_2)));
    (0..n_bins)
        .map(|b| cdf((b + 1) as f64 * bin_ms) - cdf(b as f64 * bin_ms))
        .collect()
}

/// Most bins a scenario's window may hold.
pub const MAX_SCENARIO_BINS: f64 = 100_000.0;
/// Most trials per stimulus a scenario may ask for.
pub const MAX_SCENARIO_TRIALS: u32 = 100_000;

/// Checks a value is finite and within `[lo, hi]`, naming the field and the range.
fn within(field: &str, x: f64, lo: f64, hi: f64) -> Result<(), ScenarioError> {
    if x.is_finite() && x >= lo && x <= hi {
        Ok(())
    } else {
        Err(ScenarioError::Invalid(format!(
            "{field} = {x} is out of range: it must be a number from {lo} to {hi}"
        )))
    }
}

impl SimOptions {
    /// Checks every setting before anything is drawn or allocated: the clock, the gaps, the
    /// background rate, the number of trials, and that the whole session's ticks fit in i64.
    pub fn check(&self, window_s: f64, n_stimuli: usize) -> Result<(), ScenarioError> {
        within("tick_rate_hz", self.tick_rate_hz, 1.0, 1e10)?;
        within("spontaneous_hz", self.spontaneous_hz, 0.0, 1000.0)?;
        within("gap (minimum, s)", self.gap_s.0, 0.0, 1e4)?;
        within("gap (maximum, s)", self.gap_s.1, self.gap_s.0, 1e4)?;
        if self.trials_per_stimulus > MAX_SCENARIO_TRIALS {
            return Err(ScenarioError::Invalid(format!(
                "trials_per_stimulus = {} is more than {MAX_SCENARIO_TRIALS}",
                self.trials_per_stimulus
            )));
        }
        let session_s =
            self.trials_per_stimulus as f64 * n_stimuli as f64 * (window_s + self.gap_s.1);
        if session_s * self.tick_rate_hz > 4e18 {
            return Err(ScenarioError::Invalid(format!(
                "a session of {session_s:.0} s at {} ticks/s does not fit the 64-bit tick range; lower the tick rate or the trials",
                self.tick_rate_hz
            )));
        }
        Ok(())
    }
}

impl Scenario {
    /// Checks every field's range before anything is built (limits in README "Simulating").
    pub fn check(&self) -> Result<(), ScenarioError> {
        let inv = |m: String| Err(ScenarioError::Invalid(m));
        if self.stimuli.len() < 2 || self.units.is_empty() {
            return inv("needs at least two stimuli and one unit".into());
        }
        within("bin_width_ms", self.bin_width_ms, 0.001, 1000.0)?;
        within(
            "window_ms",
            self.window_ms,
            self.bin_width_ms,
            self.bin_width_ms * MAX_SCENARIO_BINS,
        )?;
        within("tick_rate_hz", self.tick_rate_hz, 1.0, 1e10)?;
        if self.bin_width_ms / 1000.0 * self.tick_rate_hz < 1.0 - 1e-9 {
            return inv(format!(
                "bin_width_ms = {} is shorter than one tick at {} ticks/s",
                self.bin_width_ms, self.tick_rate_hz
            ));
        }
        for (name, dir) in &self.stimuli {
            within(&format!("direction of stimulus {name:?}"), *dir, -1e6, 1e6)?;
        }
        for u in &self.units {
            let f = |field: &str| format!("unit {}: {field}", u.id);
            within(&f("preferred_deg"), u.preferred_deg, -1e6, 1e6)?;
            within(&f("baseline_count"), u.baseline_count, 1e-6, 1e4)?;
            within(&f("peak_count"), u.peak_count, 1e-6, 1e4)?;
            within(&f("fano"), u.fano, 1e-3, 100.0)?;
            within(&f("early_ms"), u.early_ms, 0.0, self.window_ms)?;
            within(&f("late_ms"), u.late_ms, 0.0, self.window_ms)?;
            within(
                &f("width_ms"),
                u.width_ms,
                self.bin_width_ms / 10.0,
                self.window_ms,
            )?;
        }
        // The model it describes, and the simulator's cumulative tables (one per cell), in
        // the memory budget: checked before any is built.
        let nb = (self.window_ms / self.bin_width_ms).round() as usize;
        let (nu, ns) = (self.units.len(), self.stimuli.len());
        auspex_engine::budget::check(
            "the scenario's model",
            || format!("{nu} units × {ns} stimuli × {nb} bins"),
            auspex_engine::model::decoding_bytes(nu, ns, nb)
                + auspex_engine::budget::product(&[nu as u128, ns as u128, nb as u128, 8 * 3]),
        )
        .map_err(|e| ScenarioError::Model(e.into()))?;
        self.sim_options()
            .check(self.window_ms / 1000.0, self.stimuli.len())
    }

    /// The true model this scenario describes.
    pub fn true_model(&self) -> Result<ModelSpec, ScenarioError> {
        self.check()?;
        let inv = |m: String| Err(ScenarioError::Invalid(m));
        if self.stimuli.len() < 2 || self.units.is_empty() {
            return inv("needs at least two stimuli and one unit".into());
        }
        if !(self.bin_width_ms > 0.0 && self.window_ms >= self.bin_width_ms) {
            return inv("bin_width_ms must be > 0 and window_ms at least one bin".into());
        }
        let nb = (self.window_ms / self.bin_width_ms).round() as usize;
        let mut cells = Vec::new();
        for u in &self.units {
            if !(u.baseline_count > 0.0 && u.peak_count > 0.0 && u.width_ms > 0.0 && u.fano > 0.0) {
                return inv(format!("unit {}: counts, width and fano must be > 0", u.id));
            }
            let fam = CountFamily::parse(&u.count_family).ok_or_else(|| {
                ScenarioError::Invalid(format!(
                    "unit {}: unknown count family {:?}",
                    u.id, u.count_family
                ))
            })?;
            for (_, dir) in &self.stimuli {
                let c = (dir - u.preferred_deg).to_radians().cos();
                let mean = u.baseline_count + (u.peak_count - u.baseline_count) * c * c;
                let count = match fam {
                    CountFamily::Poisson => CountParams::Poisson { mean },
                    CountFamily::NegativeBinomial => {
                        if u.fano <= 1.0 {
                            return inv(format!("unit {}: negative binomial needs fano > 1", u.id));
                        }
                        CountParams::NegativeBinomial {
                            mean,
                            shape: mean / (u.fano - 1.0),
                        }
                    }
                    CountFamily::ComPoisson => {
                        // Standard large-mean approximation: ν ≈ 1/F, λ ≈ (μ + (ν−1)/(2ν))^ν.
                        let nu = 1.0 / u.fano;
                        CountParams::ComPoisson {
                            lambda: (mean + (nu - 1.0) / (2.0 * nu)).max(1e-3).powf(nu),
                            nu,
                        }
                    }
                    CountFamily::Empirical => {
                        return inv(format!("unit {}: empirical is not a scenario family", u.id))
                    }
                };
                // Response bump carries the stimulus-driven share; the baseline share is flat.
                let latency = if c >= 0.0 { u.early_ms } else { u.late_ms };
                let bump = gauss_bins(nb, self.bin_width_ms, latency, u.width_ms);
                let bsum: f64 = bump.iter().sum();
                let flat_share = (u.baseline_count / mean).min(1.0) * 0.5;
                let mut q: Vec<f64> = bump
                    .iter()
                    .map(|x| (1.0 - flat_share) * x / bsum + flat_share / nb as f64)
                    .collect();
                crate::density::floor_timing(&mut q);
                cells.push(CellSpec {
                    count,
                    timing: q,
                    summary: CellSummary::default(),
                });
            }
        }
        let spec = ModelSpec {
            bin_width_s: self.bin_width_ms / 1000.0,
            n_bins: nb as u32,
            stimuli: self.stimuli.iter().map(|s| s.0.clone()).collect(),
            units: self.units.iter().map(|u| u.id).collect(),
            prior: vec![1.0 / self.stimuli.len() as f64; self.stimuli.len()],
            cells,
            calibration: Default::default(),
            unit_groups: Vec::new(),
        };
        Model::new(spec.clone())?;
        Ok(spec)
    }

    /// The simulation settings of this scenario.
    pub fn sim_options(&self) -> SimOptions {
        SimOptions {
            trials_per_stimulus: self.trials_per_stimulus,
            gap_s: (self.gap_ms.0 / 1000.0, self.gap_ms.1 / 1000.0),
            spontaneous_hz: self.spontaneous_hz,
            tick_rate_hz: self.tick_rate_hz,
            seed: self.seed,
        }
    }
}

/// How to draw a dataset from a model.
#[derive(Clone, Debug, PartialEq)]
pub struct SimOptions {
    /// Trials per stimulus.
    pub trials_per_stimulus: u32,
    /// Gap between a window's end and the next onset, seconds, uniform on [min, max].
    pub gap_s: (f64, f64),
    /// Background rate between windows, Hz (per unit).
    pub spontaneous_hz: f64,
    /// Clock ticks per second.
    pub tick_rate_hz: f64,
    /// Seed.
    pub seed: u64,
}

/// Draws a dataset from `model`. Stimuli come in balanced random blocks; trial ids count from 1.
pub fn simulate(model: &Model, opts: &SimOptions) -> Dataset {
    let mut rng = ChaCha8Rng::seed_from_u64(opts.seed);
    let (nu, ns, nb) = (model.n_units(), model.n_stimuli(), model.n_bins());
    let bin_ticks = (model.bin_width_s() * opts.tick_rate_hz).round().max(1.0) as i64;
    let window = bin_ticks * nb as i64;
    // Cumulative tables once.
    let cum = |v: &[f64]| -> Vec<f64> {
        let mut acc = 0.0;
        v.iter()
            .map(|x| {
                acc += x;
                acc
            })
            .collect()
    };
    let count_cdf: Vec<Vec<f64>> = (0..nu * ns)
        .map(|i| cum(model.count(i / ns, i % ns).pmf()))
        .collect();
    let time_cdf: Vec<Vec<f64>> = (0..nu * ns)
        .map(|i| cum(model.timing(i / ns, i % ns)))
        .collect();
    let draw = |cdf: &[f64], u: f64| -> usize {
        cdf.partition_point(|&c| c < u * cdf[cdf.len() - 1])
            .min(cdf.len() - 1)
    };

    let mut trials = Vec::new();
    let mut spikes = Vec::new();
    let mut t = (opts.gap_s.0 * opts.tick_rate_hz).round() as i64;
    let mut id = 1u64;
    let background = |from: i64, to: i64, rng: &mut ChaCha8Rng, spikes: &mut Vec<(i64, u32)>| {
        if opts.spontaneous_hz <= 0.0 || to <= from {
            return;
        }
        for &unit in model.units() {
            let mut x = from as f64;
            loop {
                let u: f64 = rng.gen::<f64>().max(1e-300);
                x += -u.ln() / opts.spontaneous_hz * opts.tick_rate_hz;
                if x >= to as f64 {
                    break;
                }
                spikes.push((x as i64, unit));
            }
        }
    };
    background(0, t, &mut rng, &mut spikes);
    for _block in 0..opts.trials_per_stimulus {
        let mut order: Vec<usize> = (0..ns).collect();
        for i in (1..ns).rev() {
            let j = rng.gen_range(0..=i);
            order.swap(i, j);
        }
        for s in order {
            trials.push(Trial {
                id,
                onset: t,
                stimulus: Some(model.stimuli()[s].clone()),
            });
            id += 1;
            for u in 0..nu {
                let n = draw(&count_cdf[u * ns + s], rng.gen::<f64>());
                for _ in 0..n {
                    let b = draw(&time_cdf[u * ns + s], rng.gen::<f64>());
                    let within = (rng.gen::<f64>() * bin_ticks as f64) as i64;
                    spikes.push((
                        t + b as i64 * bin_ticks + within.min(bin_ticks - 1),
                        model.units()[u],
                    ));
                }
            }
            let gap = opts.gap_s.0 + (opts.gap_s.1 - opts.gap_s.0).max(0.0) * rng.gen::<f64>();
            let next = t + window + (gap * opts.tick_rate_hz).round() as i64;
            background(t + window, next, &mut rng, &mut spikes);
            t = next;
        }
    }
    spikes.sort_unstable();
    let mut units = model.units().to_vec();
    units.sort_unstable();
    Dataset {
        tick_rate_hz: opts.tick_rate_hz,
        trials,
        spikes: spikes.into(),
        units,
        declared_from: Default::default(),
        stimulus_order: Vec::new(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn base() -> Scenario {
        Scenario {
            description: "check".into(),
            stimuli: vec![("a".into(), 0.0), ("b".into(), 90.0)],
            bin_width_ms: 1.0,
            window_ms: 50.0,
            trials_per_stimulus: 3,
            gap_ms: (10.0, 20.0),
            spontaneous_hz: 2.0,
            tick_rate_hz: 1e6,
            seed: 1,
            units: vec![ScenarioUnit {
                id: 1,
                preferred_deg: 0.0,
                baseline_count: 1.0,
                peak_count: 3.0,
                count_family: "poisson".into(),
                fano: 1.0,
                early_ms: 10.0,
                late_ms: 30.0,
                width_ms: 5.0,
            }],
        }
    }

    /// Each value that used to panic, loop for ever or ask for gigabytes is refused before
    /// anything is built, naming its field.
    #[test]
    fn out_of_range_scenarios_are_refused_naming_the_field() {
        assert!(base().true_model().is_ok());
        type Case = (&'static str, Box<dyn Fn(&mut Scenario)>);
        let cases: Vec<Case> = vec![
            ("window_ms", Box::new(|s| s.window_ms = f64::INFINITY)),
            ("window_ms", Box::new(|s| s.window_ms = 1e6)),
            ("bin_width_ms", Box::new(|s| s.bin_width_ms = 1e-6)),
            ("spontaneous_hz", Box::new(|s| s.spontaneous_hz = f64::NAN)),
            (
                "spontaneous_hz",
                Box::new(|s| s.spontaneous_hz = f64::INFINITY),
            ),
            ("tick_rate_hz", Box::new(|s| s.tick_rate_hz = -5.0)),
            ("tick_rate_hz", Box::new(|s| s.tick_rate_hz = 1e300)),
            (
                "64-bit tick range",
                Box::new(|s| {
                    s.tick_rate_hz = 1e10;
                    s.gap_ms = (1e6, 1e7);
                    s.trials_per_stimulus = 100_000;
                }),
            ),
            ("gap", Box::new(|s| s.gap_ms = (20.0, 10.0))),
            (
                "trials_per_stimulus",
                Box::new(|s| s.trials_per_stimulus = u32::MAX),
            ),
            ("unit 1: width_ms", Box::new(|s| s.units[0].width_ms = 0.0)),
            ("unit 1: fano", Box::new(|s| s.units[0].fano = f64::NAN)),
            ("unit 1: late_ms", Box::new(|s| s.units[0].late_ms = 1e9)),
        ];
        for (field, set) in cases {
            let mut s = base();
            set(&mut s);
            match s.true_model() {
                Ok(_) => panic!("{field}: accepted"),
                Err(e) => assert!(e.to_string().contains(field), "{field}: {e}"),
            }
        }
    }
}
