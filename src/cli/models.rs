//! The model files a command reads: one model, or an ensemble (a file of several members, or
//! several files given with `--with`).

use std::path::{Path, PathBuf};

use neural_sde::{
    Ensemble, EvalOptions, Evaluation, Imputation, ImputeOptions, Table, TabularModel,
};

use super::Failure;

/// What a command uses: one model, or the ensemble of several.
pub enum Scored {
    One(Box<TabularModel>),
    Many(Ensemble),
}

impl Scored {
    /// The model file `model` with the files `with`: each file weighs the same in the
    /// ensemble, its members sharing its weight. Every file must model the columns of the
    /// first.
    pub fn load(model: &Path, with: &[PathBuf]) -> Result<Self, Failure> {
        let first = Ensemble::load(model)?;
        if with.is_empty() {
            return Self::from_ensemble(first);
        }
        let files = 1 + with.len();
        let mut members = Vec::new();
        let mut weights = Vec::new();
        let mut take = |e: Ensemble| {
            weights.extend(e.weights().iter().map(|w| w / files as f64));
            members.extend(e.into_members());
        };
        let reference = first.members()[0].columns().len();
        let checked: Vec<Ensemble> = with
            .iter()
            .map(|path| {
                let e = Ensemble::load(path)?;
                if !e.members()[0].same_columns_as(&first.members()[0]) {
                    return Err(Failure::input(format!(
                        "--with {}: its columns or column types differ from those of {} ({} columns against {reference}); an ensemble combines models of the same columns, e.g. fits of one table with different --seed",
                        path.display(),
                        model.display(),
                        e.members()[0].columns().len(),
                    )));
                }
                Ok(e)
            })
            .collect::<Result<_, Failure>>()?;
        take(first);
        checked.into_iter().for_each(&mut take);
        Ok(Scored::Many(Ensemble::with_weights(members, &weights)?))
    }

    fn from_ensemble(e: Ensemble) -> Result<Self, Failure> {
        if e.members().len() > 1 {
            return Ok(Scored::Many(e));
        }
        // One member: used as the model itself (its rows are the model's own draws).
        match <[TabularModel; 1]>::try_from(e.into_members()) {
            Ok([m]) => Ok(Scored::One(Box::new(m))),
            Err(members) => Ok(Scored::Many(Ensemble::new(members)?)),
        }
    }

    /// The model, or the ensemble's first member (its columns and types are every member's).
    pub fn first(&self) -> &TabularModel {
        match self {
            Scored::One(m) => m,
            Scored::Many(e) => &e.members()[0],
        }
    }

    /// How many models.
    pub fn count(&self) -> usize {
        match self {
            Scored::One(_) => 1,
            Scored::Many(e) => e.members().len(),
        }
    }

    pub fn evaluate(&self, table: &Table, options: EvalOptions) -> neural_sde::Result<Evaluation> {
        match self {
            Scored::One(m) => m.evaluate(table, options),
            Scored::Many(e) => e.evaluate(table, options),
        }
    }

    pub fn generate(&self, rows: usize, seed: u64) -> neural_sde::Result<Table> {
        match self {
            Scored::One(m) => m.generate(rows, seed),
            Scored::Many(e) => e.generate(rows, seed),
        }
    }

    pub fn generate_csv(&self, path: &Path, rows: usize, seed: u64) -> neural_sde::Result<Table> {
        match self {
            Scored::One(m) => m.generate_csv(path, rows, seed),
            Scored::Many(e) => e.generate_csv(path, rows, seed),
        }
    }

    pub fn impute(&self, table: &Table, options: ImputeOptions) -> neural_sde::Result<Imputation> {
        match self {
            Scored::One(m) => m.impute(table, options),
            Scored::Many(e) => e.impute(table, options),
        }
    }

    pub fn generate_given(
        &self,
        rows: usize,
        given: &[(String, String)],
        options: ImputeOptions,
    ) -> neural_sde::Result<Imputation> {
        match self {
            Scored::One(m) => m.generate_given(rows, given, options),
            Scored::Many(e) => e.generate_given(rows, given, options),
        }
    }
}
