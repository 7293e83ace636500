//! The trainer's choice of starting point: one Gaussian, or the Gaussian mixture that BIC
//! selects on the training rows (which `LatentModel::init_from_mixture` makes the untrained
//! model's marginal).

use crate::error::{Error, Result};
use crate::tabular::mixture::{Covariance, MixtureModel, MixtureOptions};
use crate::tabular::model::{LatentConfig, RowLayout};
use crate::tabular::table::Table;

/// Rows the mixture's EM reads at most (the first ones of the shuffled training rows).
const MIXTURE_ROWS: usize = 5_000;
/// Continuous columns above which the count is not chosen by BIC (one Gaussian), since
/// full covariances then need far more rows than usual tables have.
const MIXTURE_COLUMNS: usize = 64;

/// Training rows × continuous columns up to which the start's EM uses the baseline's
/// settings (every open table measured has fewer; larger tables use fewer restarts and
/// iterations, since EM's time grows with rows × columns² × components).
const FULL_EM_VALUES: usize = 20_000;

/// A mixture start: weights, means (`M × D_c`) and covariances (`M × D_c × D_c`).
pub(super) type MixtureParts = (Vec<f64>, Vec<f64>, Vec<f64>);

/// The mixture to start from for the standardised coded training `rows`, or `None` for the
/// single Gaussian: `cfg.noise_components` `Some(1)`, or `None` when BIC prefers one
/// component, the table has missing continuous cells or categorical columns, has more than
/// [`MIXTURE_COLUMNS`] continuous columns, or EM fails.
///
/// # Errors
/// With an explicit count above 1: [`Error::InvalidConfig`] if some continuous cell is
/// missing, and EM's errors.
pub(super) fn noise_mixture(
    cfg: &LatentConfig,
    layout: &RowLayout,
    rows: &[f64],
    seed: u64,
) -> Result<Option<MixtureParts>> {
    let dc = layout.continuous;
    let (cw, ow) = (layout.coded_width(), layout.output_width());
    let complete = rows
        .chunks_exact(cw)
        .all(|r| r[ow..].iter().all(|&m| m > 0.5));
    match cfg.noise_components {
        Some(1) => return Ok(None),
        Some(m) if !complete => {
            return Err(Error::config(
                "noise_components",
                m,
                "a noise mixture is fitted to complete rows, and the table has missing continuous cells; use 1 component",
            ))
        }
        // With categorical columns the mixture would explain the clusters through a
        // component the categorical cells cannot see, and the latent path that links them
        // would have nothing left to learn: such tables start from one Gaussian.
        None if !complete || dc > MIXTURE_COLUMNS || !layout.levels.is_empty() => {
            return Ok(None)
        }
        _ => {}
    }
    let mut values = Vec::with_capacity(MIXTURE_ROWS.min(rows.len() / cw) * dc);
    for r in rows.chunks_exact(cw).take(MIXTURE_ROWS) {
        values.extend_from_slice(&r[..dc]);
    }
    let columns = (0..dc).map(|j| format!("c{j}")).collect();
    let table = Table::from_flat(columns, values, "<training rows>".into())?;
    // Up to [`FULL_EM_VALUES`] values, the baseline's own EM settings: the start is fitted
    // the way `evaluate --baseline` fits its mixtures. The start used 2 restarts of at most
    // 150 iterations before; they reach a lower likelihood for the larger counts, so BIC
    // could choose another count than the baseline would, and with the baseline's settings
    // the defaults gained +0.035 (iris) and +0.010 (diabetes) per dimension over seeds 0–7,
    // with wine unchanged and the demo table within 0.001 (benches/README.md). Those
    // settings cost about 2.5× the EM time (measured: 256 s against 92 s for 5,000 rows of
    // 30 columns), so larger tables keep the cheaper ones.
    let options = if table.n_rows() * dc <= FULL_EM_VALUES {
        MixtureOptions {
            seed,
            ..MixtureOptions::default()
        }
    } else {
        MixtureOptions {
            seed,
            restarts: 2,
            max_iterations: 150,
            tolerance: 1e-6,
            ..MixtureOptions::default()
        }
    };
    let fitted = match cfg.noise_components {
        Some(m) => MixtureModel::fit(&table, m, Covariance::Full, &options)?,
        None => match MixtureModel::select(&table, Covariance::Full, &options) {
            Ok(m) => m,
            Err(_) => return Ok(None),
        },
    };
    if fitted.components() == 1 && cfg.noise_components.is_none() {
        return Ok(None);
    }
    Ok(Some(fitted.in_table_units()))
}
