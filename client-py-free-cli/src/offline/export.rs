//! The JSON interchange export of a model: exactly the numbers the engine uses, so anyone can
//! recompute the posteriors independently (schema documented in README.md).

use auspex_engine::Model;
use serde::Serialize;

#[derive(Serialize)]
struct CellJson<'a> {
    unit: u32,
    stimulus: &'a str,
    family: &'a str,
    count_pmf: &'a [f64],
    timing: Vec<f64>,
}

#[derive(Serialize)]
struct ModelJson<'a> {
    bin_width_s: f64,
    window_s: f64,
    stimuli: &'a [String],
    units: &'a [u32],
    prior: Vec<f64>,
    /// β(b) per bin: posterior_s(b) = softmax_s(ln prior_s + β(b)·log L_s(b)); all 1 when the
    /// model is not calibrated.
    calibration_factors: Vec<f64>,
    /// ε: posterior = (1 − ε)·softmax(…) + ε·prior (0 without a floor).
    calibration_floor: f64,
    calibration_method: &'a str,
    cells: Vec<CellJson<'a>>,
}

/// The model as interchange JSON.
pub fn model_json(m: &Model) -> String {
    let ns = m.n_stimuli();
    let mut cells = Vec::with_capacity(m.n_units() * ns);
    for u in 0..m.n_units() {
        for s in 0..ns {
            let q = m.timing(u, s);
            let qs: f64 = q.iter().sum();
            cells.push(CellJson {
                unit: m.units()[u],
                stimulus: &m.stimuli()[s],
                family: m.count(u, s).family().name(),
                count_pmf: m.count(u, s).pmf(),
                timing: q.iter().map(|x| x / qs).collect(),
            });
        }
    }
    let j = ModelJson {
        bin_width_s: m.bin_width_s(),
        window_s: m.bin_width_s() * m.n_bins() as f64,
        stimuli: m.stimuli(),
        units: m.units(),
        prior: m.ln_prior().iter().map(|l| l.exp()).collect(),
        calibration_factors: if m.calibration().factors.is_empty() {
            vec![1.0; m.n_bins()]
        } else {
            m.calibration().factors.clone()
        },
        calibration_floor: m.calibration().floor,
        calibration_method: m.calibration().method.name(),
        cells,
    };
    serde_json::to_string_pretty(&j).expect("plain numbers and strings serialise")
}
