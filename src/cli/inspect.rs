//! `neural-sde inspect`.

use std::path::PathBuf;

use clap::Args;

use super::Failure;

#[derive(Debug, Args)]
pub struct InspectArgs {
    /// Model written by `neural-sde fit`.
    model: PathBuf,
}

pub fn run(a: InspectArgs) -> Result<(), Failure> {
    let all = neural_sde::inspect_members(&a.model)?;
    let info = &all[0];
    println!("file           {}", a.model.display());
    println!(
        "written by     neural-sde {} (format {} v{})",
        info.crate_version, info.format, info.format_version
    );
    println!("columns        {}", info.columns.len());
    println!(
        "  {:<24} {:<12} {:>14} {:>14}",
        "name", "type", "mean", "scale"
    );
    let mut c = 0;
    for (name, kind) in info.columns.iter().zip(&info.schema.kinds) {
        match kind.levels() {
            None => {
                println!(
                    "  {:<24} {:<12} {:>14.6} {:>14.6}",
                    name, "continuous", info.scaler.mean[c], info.scaler.scale[c]
                );
                c += 1;
            }
            Some(levels) => println!(
                "  {:<24} {:<12} levels: {}",
                name,
                "categorical",
                levels.join(", ")
            ),
        }
    }
    if !info.schema.missing_markers.is_empty() {
        println!(
            "missing cells  empty, NA, {}",
            info.schema.missing_markers.join(", ")
        );
    }
    if all.len() > 1 {
        let weights: Vec<String> = all.iter().map(|m| format!("{:.4}", m.weight)).collect();
        println!(
            "models         {} (an ensemble: the mixture of their densities, weights {})",
            all.len(),
            weights.join(", ")
        );
    }
    for (i, member) in all.iter().enumerate() {
        if all.len() > 1 {
            println!("model {}", i + 1);
        }
        member_lines(member);
    }
    Ok(())
}

/// The lines about one model: its size, configuration and training.
fn member_lines(info: &neural_sde::CheckpointSummary) {
    println!("parameters     {}", info.parameters);
    println!(
        "model          {}",
        serde_json::to_string(&info.model_config).unwrap_or_default()
    );
    match (&info.train_config, &info.state) {
        (Some(tc), Some(st)) => {
            println!(
                "training       {}",
                serde_json::to_string(tc).unwrap_or_default()
            );
            let d = info.columns.len().max(1) as f64;
            let jac = info.scaler.log_jacobian();
            println!(
                "progress       {} epochs, {} steps, ended: {}",
                st.epoch,
                st.step,
                st.finished
                    .map(|t| format!("{t:?}"))
                    .unwrap_or_else(|| "no (resumable)".into())
            );
            if let Some(b) = st.best_elbo {
                println!(
                    "best ELBO      {:.4} nats per dimension (data units), epoch {}",
                    (b + jac) / d,
                    st.best_epoch
                );
            }
        }
        _ => println!("training       no training state stored"),
    }
}
