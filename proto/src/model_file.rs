//! Model files on disk: conversion between the engine's `ModelSpec` and the `ModelFile` schema,
//! and loading/saving with errors that name the file. The one place either happens: the daemon
//! and the command-line client both load and save through here.

use crate::v1;
use auspex_engine::calibration::{Calibration, CalibrationMethod, ThresholdEvidence};
use auspex_engine::count::{CountFamily, CountParams};
use auspex_engine::model::{CellSpec, CellSummary, ModelSpec};
use std::path::Path;

/// Why a model file could not be used.
#[derive(Debug, thiserror::Error)]
pub enum ModelLoadError {
    /// Reading or writing failed. (The causes are part of the message, not separate sources,
    /// so an error chain names them once.)
    #[error("{path}: {cause}")]
    Io {
        /// The file.
        path: String,
        /// The cause.
        cause: std::io::Error,
    },
    /// Bytes are not a model file.
    #[error("{path}: {cause}{hint}")]
    Format {
        /// The file.
        path: String,
        /// The cause.
        cause: crate::ModelFileError,
        /// What the file looks like instead, if recognisable.
        hint: &'static str,
    },
    /// The contents do not make a valid model.
    #[error("{path}: {msg}")]
    Invalid {
        /// The file.
        path: String,
        /// What is wrong.
        msg: String,
    },
}

fn family_to_proto(f: CountFamily) -> v1::CountFamily {
    match f {
        CountFamily::Poisson => v1::CountFamily::Poisson,
        CountFamily::NegativeBinomial => v1::CountFamily::NegativeBinomial,
        CountFamily::ComPoisson => v1::CountFamily::ComPoisson,
        CountFamily::Empirical => v1::CountFamily::Empirical,
    }
}

fn family_from_proto(f: i32) -> Option<CountFamily> {
    match v1::CountFamily::try_from(f).ok()? {
        v1::CountFamily::Poisson => Some(CountFamily::Poisson),
        v1::CountFamily::NegativeBinomial => Some(CountFamily::NegativeBinomial),
        v1::CountFamily::ComPoisson => Some(CountFamily::ComPoisson),
        v1::CountFamily::Empirical => Some(CountFamily::Empirical),
        v1::CountFamily::Unspecified => None,
    }
}

/// Spec → file message.
pub fn spec_to_proto(spec: &ModelSpec, training_data: &str) -> v1::ModelFile {
    v1::ModelFile {
        format_version: crate::MODEL_FORMAT_VERSION,
        bin_width_s: spec.bin_width_s,
        n_bins: spec.n_bins,
        stimuli: spec.stimuli.clone(),
        units: spec.units.clone(),
        prior: spec.prior.clone(),
        created_by: format!("auspex {}", env!("CARGO_PKG_VERSION")),
        training_data: training_data.into(),
        calibration: calibration_to_proto(&spec.calibration),
        unit_group_starts: spec.unit_groups.clone(),
        cells: spec
            .cells
            .iter()
            .map(|c| {
                let mut cell = v1::Cell {
                    family: family_to_proto(c.count.family()) as i32,
                    timing: c.timing.clone(),
                    summary: Some(v1::CellFitSummary {
                        n_trials: c.summary.n_trials,
                        mean_count: c.summary.mean_count,
                        var_count: c.summary.var_count,
                        bandwidth_s: c.summary.bandwidth_s,
                        held_out: c
                            .summary
                            .held_out
                            .iter()
                            .map(|(f, s)| v1::FamilyScore {
                                family: family_to_proto(*f) as i32,
                                log_lik_per_trial: *s,
                            })
                            .collect(),
                    }),
                    ..Default::default()
                };
                match &c.count {
                    CountParams::Poisson { mean } => cell.mean = *mean,
                    CountParams::NegativeBinomial { mean, shape } => {
                        cell.mean = *mean;
                        cell.shape = *shape;
                    }
                    CountParams::ComPoisson { lambda, nu } => {
                        cell.lambda = *lambda;
                        cell.nu = *nu;
                    }
                    CountParams::Empirical { pmf } => cell.count_table = pmf.clone(),
                }
                cell
            })
            .collect(),
    }
}

/// File message → spec (shape checks happen when the engine builds the `Model`).
/// A model file's contents that name something this version does not know.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum SpecError {
    /// A cell's count family is not one of ours.
    #[error(
        "cell {cell} (unit index {unit}, stimulus index {stimulus}): unknown count family {family}"
    )]
    UnknownFamily {
        /// Cell index (unit-major).
        cell: usize,
        /// Unit index.
        unit: usize,
        /// Stimulus index.
        stimulus: usize,
        /// The family number found.
        family: i32,
    },
    /// The calibration method is not one of ours.
    #[error("unknown calibration method {0}")]
    UnknownCalibration(i32),
}

/// The engine's model spec from a model file's message (checked further by `Model::new`).
impl TryFrom<&v1::ModelFile> for ModelSpec {
    type Error = SpecError;
    fn try_from(m: &v1::ModelFile) -> Result<Self, SpecError> {
        spec_from_proto(m)
    }
}

/// The engine's model spec from a model file's message (see the `TryFrom` conversion).
pub fn spec_from_proto(m: &v1::ModelFile) -> Result<ModelSpec, SpecError> {
    let ns = m.stimuli.len().max(1);
    let cells = m
        .cells
        .iter()
        .enumerate()
        .map(|(i, c)| {
            let fam = family_from_proto(c.family).ok_or(SpecError::UnknownFamily {
                cell: i,
                unit: i / ns,
                stimulus: i % ns,
                family: c.family,
            })?;
            let count = match fam {
                CountFamily::Poisson => CountParams::Poisson { mean: c.mean },
                CountFamily::NegativeBinomial => CountParams::NegativeBinomial {
                    mean: c.mean,
                    shape: c.shape,
                },
                CountFamily::ComPoisson => CountParams::ComPoisson {
                    lambda: c.lambda,
                    nu: c.nu,
                },
                CountFamily::Empirical => CountParams::Empirical {
                    pmf: c.count_table.clone(),
                },
            };
            let s = c.summary.clone().unwrap_or_default();
            Ok(CellSpec {
                count,
                timing: c.timing.clone(),
                summary: CellSummary {
                    n_trials: s.n_trials,
                    mean_count: s.mean_count,
                    var_count: s.var_count,
                    bandwidth_s: s.bandwidth_s,
                    held_out: s
                        .held_out
                        .iter()
                        .filter_map(|h| {
                            family_from_proto(h.family).map(|f| (f, h.log_lik_per_trial))
                        })
                        .collect(),
                },
            })
        })
        .collect::<Result<Vec<_>, SpecError>>()?;
    Ok(ModelSpec {
        bin_width_s: m.bin_width_s,
        n_bins: m.n_bins,
        stimuli: m.stimuli.clone(),
        units: m.units.clone(),
        prior: m.prior.clone(),
        cells,
        calibration: calibration_from_proto(m.calibration.as_ref())?,
        unit_groups: m.unit_group_starts.clone(),
    })
}

fn calibration_to_proto(c: &Calibration) -> Option<v1::Calibration> {
    if c == &Calibration::default() {
        return None;
    }
    Some(v1::Calibration {
        method: match c.method {
            CalibrationMethod::None => v1::CalibrationMethod::CalibrationNone,
            CalibrationMethod::Temperature => v1::CalibrationMethod::Temperature,
            CalibrationMethod::BandedTemperature => v1::CalibrationMethod::BandedTemperature,
            CalibrationMethod::TemperatureFloor => v1::CalibrationMethod::TemperatureFloor,
        } as i32,
        floor: c.floor,
        factor: c.factors.clone(),
        held_out_trials: c.held_out_trials,
        folds: c.folds,
        log_loss_uncalibrated: c.log_loss_uncalibrated,
        log_loss_calibrated: c.log_loss_calibrated,
        min_time_s: c.min_time_s,
        evidence: c
            .evidence
            .iter()
            .map(|e| v1::ThresholdRecord {
                threshold: e.threshold,
                trials: e.trials,
                correct: e.correct,
                accuracy_lo: e.lo,
                accuracy_hi: e.hi,
                median_decision_ms: e.median_decision_ms,
                early: e.early,
                early_correct: e.early_correct,
            })
            .collect(),
    })
}

fn calibration_from_proto(c: Option<&v1::Calibration>) -> Result<Calibration, SpecError> {
    let Some(c) = c else {
        return Ok(Calibration::default());
    };
    let method = match v1::CalibrationMethod::try_from(c.method) {
        Ok(v1::CalibrationMethod::CalibrationNone) => CalibrationMethod::None,
        Ok(v1::CalibrationMethod::Temperature) => CalibrationMethod::Temperature,
        Ok(v1::CalibrationMethod::BandedTemperature) => CalibrationMethod::BandedTemperature,
        Ok(v1::CalibrationMethod::TemperatureFloor) => CalibrationMethod::TemperatureFloor,
        Err(_) => return Err(SpecError::UnknownCalibration(c.method)),
    };
    Ok(Calibration {
        method,
        factors: c.factor.clone(),
        floor: c.floor,
        held_out_trials: c.held_out_trials,
        folds: c.folds,
        log_loss_uncalibrated: c.log_loss_uncalibrated,
        log_loss_calibrated: c.log_loss_calibrated,
        min_time_s: c.min_time_s,
        evidence: c
            .evidence
            .iter()
            .map(|e| ThresholdEvidence {
                threshold: e.threshold,
                trials: e.trials,
                correct: e.correct,
                lo: e.accuracy_lo,
                hi: e.accuracy_hi,
                median_decision_ms: e.median_decision_ms,
                early: e.early,
                early_correct: e.early_correct,
            })
            .collect(),
    })
}

/// Writes a model file.
pub fn save_model(
    path: &Path,
    spec: &ModelSpec,
    training_data: &str,
) -> Result<(), ModelLoadError> {
    let bytes = crate::encode_model_file(&spec_to_proto(spec, training_data));
    std::fs::write(path, bytes).map_err(|e| ModelLoadError::Io {
        path: path.display().to_string(),
        cause: e,
    })
}

/// What a model file says it was fitted on (empty when it cannot be read).
pub fn training_data(path: &Path) -> String {
    std::fs::read(path)
        .ok()
        .and_then(|b| crate::decode_model_file(&b).ok())
        .map(|m| m.training_data)
        .unwrap_or_default()
}

/// Reads and validates a model file, returning the spec and the built model.
pub fn load_model(path: &Path) -> Result<(ModelSpec, auspex_engine::Model), ModelLoadError> {
    let p = path.display().to_string();
    let bytes = std::fs::read(path).map_err(|e| ModelLoadError::Io {
        path: p.clone(),
        cause: e,
    })?;
    let m = crate::decode_model_file(&bytes).map_err(|e| ModelLoadError::Format {
        path: p.clone(),
        hint: match bytes.iter().find(|b| !b.is_ascii_whitespace()) {
            Some(b'{') => " — this looks like JSON: `auspex export` writes JSON for reading; give the .apxm file `auspex fit` wrote",
            Some(b'u') | Some(b't') if bytes.contains(&b',') => " — this looks like a CSV table; give the .apxm file `auspex fit` wrote",
            _ => "",
        },
        cause: e,
    })?;
    let spec = ModelSpec::try_from(&m).map_err(|e| ModelLoadError::Invalid {
        path: p.clone(),
        msg: e.to_string(),
    })?;
    let model = auspex_engine::Model::new(spec.clone()).map_err(|e| ModelLoadError::Invalid {
        path: p,
        msg: e.to_string(),
    })?;
    Ok((spec, model))
}
