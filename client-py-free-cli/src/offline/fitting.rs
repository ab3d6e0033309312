//! The `fit` job: plan the cells, fit them on every core with a progress bar, and summarise.

use auspex_engine::count::CountFamily;
use auspex_engine::data::Dataset;
use auspex_engine::model::{CellSpec, ModelSpec};
use auspex_modelling::fit::{plan, FitOptions, FitPlan};

/// Fits every cell of `plan` on every core (`auspex_modelling::fit::fit_cells`); `progress`
/// shows a bar on a terminal.
pub fn fit_cells(plan: &FitPlan, progress: bool) -> Vec<CellSpec> {
    let bar = crate::progress::bar(
        progress,
        plan.cells.len() as u64,
        "fitting",
        "{pos}/{len} cells",
    );
    let cells = auspex_modelling::fit::fit_cells(plan, &|| bar.inc(1));
    bar.finish_and_clear();
    cells
}

/// Plans and fits a dataset.
pub fn fit_dataset(
    data: &Dataset,
    opts: &FitOptions,
    progress: bool,
) -> anyhow::Result<(ModelSpec, FitPlan)> {
    let plan = plan(data, opts)?;
    let cells = fit_cells(&plan, progress);
    Ok((plan.assemble(cells), plan))
}

/// Parses a comma-separated family list (`all` for every family).
pub fn parse_families(s: &str) -> anyhow::Result<Vec<CountFamily>> {
    if s.trim() == "all" {
        return Ok(CountFamily::ALL.to_vec());
    }
    s.split(',')
        .map(|f| {
            CountFamily::parse(f).ok_or_else(|| {
                anyhow::anyhow!("unknown count family `{f}`: use poisson, negative_binomial (nb), com_poisson (com), empirical or all")
            })
        })
        .collect()
}

/// The per-cell summary table printed after a fit.
pub fn cell_table(spec: &ModelSpec) -> String {
    use std::fmt::Write;
    let ns = spec.stimuli.len();
    let mut s = String::new();
    let _ = writeln!(
        s,
        "{:>6}  {:<12} {:<18} {:>7} {:>6} {:>9}  held-out ln L/trial",
        "unit", "stimulus", "count family", "mean", "Fano", "bw (ms)"
    );
    let mut fam_counts = std::collections::BTreeMap::new();
    for (i, c) in spec.cells.iter().enumerate() {
        let (u, st) = (
            spec.units[i / ns],
            auspex_engine::data::printable(&spec.stimuli[i % ns]),
        );
        let sm = &c.summary;
        let fano = if sm.mean_count > 0.0 {
            sm.var_count / sm.mean_count
        } else {
            f64::NAN
        };
        *fam_counts.entry(c.count.family().name()).or_insert(0) += 1;
        let scores: Vec<String> = sm
            .held_out
            .iter()
            .map(|(f, v)| {
                format!(
                    "{}={}",
                    short(*f),
                    if v.is_finite() {
                        format!("{v:.2}")
                    } else {
                        "–".into()
                    }
                )
            })
            .collect();
        let _ = writeln!(
            s,
            "{:>6}  {:<12} {:<18} {:>7.2} {:>6.2} {:>9}  {}",
            u,
            st,
            c.count.family().name(),
            sm.mean_count,
            fano,
            if sm.bandwidth_s.is_finite() {
                format!("{:.1}", sm.bandwidth_s * 1000.0)
            } else {
                "–".into()
            },
            scores.join(" ")
        );
    }
    let fams: Vec<String> = fam_counts
        .iter()
        .map(|(k, v)| format!("{k}: {v}"))
        .collect();
    let _ = writeln!(s, "families chosen — {}", fams.join(", "));
    s
}

fn short(f: CountFamily) -> &'static str {
    match f {
        CountFamily::Poisson => "P",
        CountFamily::NegativeBinomial => "NB",
        CountFamily::ComPoisson => "CMP",
        CountFamily::Empirical => "E",
    }
}
