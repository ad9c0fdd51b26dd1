//! The main job as a library call: a [`Scenario`] in, every forecast out.
//!
//! cosmology -> thermal history -> CMB transfer functions (shell or full) -> CMB
//! bispectrum Fisher per experiment (radial functions shared) ; cosmology -> survey
//! Fisher per survey ; both -> [`crate::combine`]. Progress goes through a caller-given
//! callback, never to the terminal from here.

use std::collections::HashMap;
use std::sync::{Arc, Mutex, OnceLock};

use serde_json::Value;

use crate::cmb::bispectrum::{BispectrumPlan, CmbFisherInput, CmbForecast, cmb_fisher_with_plan};
use crate::cmb::experiment::Experiment;
use crate::cmb::thermal::ThermalHistory;
use crate::cmb::transfer::{RadialGrid, TransferTable};
use crate::cosmology::{Background, LinearPower, Primordial};
use crate::error::Result;
use crate::scenario::{Scenario, TransferChoice};
use crate::survey::Survey;
use crate::survey::fisher::{ShapeInput, SurveyForecast, SurveySettings, survey_fisher};

/// The CMB forecast of one experiment.
#[derive(Debug, Clone)]
pub struct CmbResult {
    /// The experiment.
    pub experiment: Experiment,
    /// Fisher matrices per field set and l_max.
    pub forecast: CmbForecast,
}

/// The forecast of one survey.
#[derive(Debug, Clone)]
pub struct SurveyResult {
    /// The survey.
    pub survey: Survey,
    /// Fisher matrices per k_max and probe, per bin and summed.
    pub forecast: SurveyForecast,
}

/// Everything a run computed.
#[derive(Debug, Clone)]
pub struct RunResult {
    /// The resolved scenario.
    pub scenario: Scenario,
    /// CMB side.
    pub cmb: Vec<CmbResult>,
    /// Survey side.
    pub surveys: Vec<SurveyResult>,
    /// What the transfer functions were (model, parameters).
    pub transfer: Value,
}

/// Settings of a run.
#[derive(Debug, Clone, Copy)]
pub struct RunSettings {
    /// Parallel outer loops.
    pub parallel: bool,
    /// Survey engine settings.
    pub survey: SurveySettings,
}

impl Default for RunSettings {
    fn default() -> Self {
        Self {
            parallel: true,
            survey: SurveySettings::default(),
        }
    }
}

/// Builds the CMB transfer functions and radial grid the scenario asks for.
///
/// # Errors
/// Thermal-history or transfer failures.
pub fn cmb_transfer(
    sc: &Scenario,
    bg: &Background,
    lmax: usize,
) -> Result<(TransferTable, RadialGrid, Value)> {
    let th = ThermalHistory::new(&sc.cosmology, bg)?;
    match sc.transfer {
        TransferChoice::Shell => {
            crate::cmb::shell_transfer_for(&th, sc.shell_width_mpc, sc.damping, lmax)
        }
        TransferChoice::Full => crate::cmb::full_transfer_for(&sc.cosmology, &th, bg, lmax),
    }
}

/// The expensive CMB pieces of a scenario: transfer table, radial grid, and the
/// bispectrum plan (radial functions), shared by every experiment.
pub struct CmbPieces {
    /// Transfer functions.
    pub table: TransferTable,
    /// Radial quadrature.
    pub radial: RadialGrid,
    /// Description of the transfer model.
    pub meta: Value,
    /// Radial functions (noise of the first experiment; others via `with_experiment`).
    pub plan: BispectrumPlan,
}

/// One cache slot: computed once, success or the error message.
type PiecesCell = OnceLock<std::result::Result<Arc<CmbPieces>, String>>;

/// A cache of [`CmbPieces`] keyed by everything they depend on (cosmology, transfer
/// model and its settings, l_max, shapes, field sets), shared by the scenarios of a
/// batch. Concurrent requests for the same key compute it once.
#[derive(Default)]
pub struct CmbCache {
    map: Mutex<HashMap<String, Arc<PiecesCell>>>,
}

impl CmbCache {
    /// The key of a scenario's CMB pieces.
    pub fn key(sc: &Scenario) -> String {
        format!(
            "{:?}|{:?}|{:?}|{}|{:?}|{:?}|{:?}",
            sc.cosmology.params(),
            sc.transfer,
            sc.shell_width_mpc,
            sc.damping,
            sc.lmax.last(),
            sc.shapes.iter().map(|s| s.name()).collect::<Vec<_>>(),
            sc.fields
        )
    }

    /// The pieces for a scenario, computed on first use.
    ///
    /// # Errors
    /// The stage's failure (reported to every scenario that shares the key).
    pub fn get(
        &self,
        sc: &Scenario,
        bg: &Background,
        parallel: bool,
        progress: &mut dyn FnMut(&str),
    ) -> Result<Arc<CmbPieces>> {
        let cell = {
            let mut m = self.map.lock().unwrap_or_else(|e| e.into_inner());
            Arc::clone(m.entry(Self::key(sc)).or_default())
        };
        let r = cell.get_or_init(|| {
            build_cmb_pieces(sc, bg, parallel, progress)
                .map(Arc::new)
                .map_err(|e| e.to_string())
        });
        r.clone().map_err(|message| crate::error::Error::Numerical {
            stage: "CMB transfer functions",
            message,
        })
    }
}

fn build_cmb_pieces(
    sc: &Scenario,
    bg: &Background,
    parallel: bool,
    progress: &mut dyn FnMut(&str),
) -> Result<CmbPieces> {
    let c = &sc.cosmology;
    let lmax = *sc.lmax.last().unwrap_or(&2000);
    progress("CMB transfer functions");
    let (table, radial, meta) = cmb_transfer(sc, bg, lmax)?;
    progress("CMB radial functions");
    let inp = CmbFisherInput {
        transfer: &table,
        primordial: Primordial::new(c),
        shapes: &sc.shapes,
        experiment: &sc.experiments[0],
        t_cmb_k: c.params().t_cmb_k,
        lmax_grid: &sc.lmax,
        field_sets: &sc.fields,
        radial: &radial,
        parallel,
    };
    let plan = BispectrumPlan::new(&inp);
    Ok(CmbPieces {
        table,
        radial,
        meta,
        plan,
    })
}

/// Runs a scenario. `progress(stage)` is called as stages start.
///
/// # Errors
/// Failures of the stages (input errors were caught when the scenario was resolved).
pub fn run_scenario(
    sc: &Scenario,
    settings: &RunSettings,
    progress: &mut dyn FnMut(&str),
) -> Result<RunResult> {
    run_scenario_cached(sc, settings, &CmbCache::default(), progress)
}

/// [`run_scenario`] with a shared cache of CMB pieces.
///
/// # Errors
/// As [`run_scenario`].
pub fn run_scenario_cached(
    sc: &Scenario,
    settings: &RunSettings,
    cache: &CmbCache,
    progress: &mut dyn FnMut(&str),
) -> Result<RunResult> {
    let c = &sc.cosmology;
    let bg = Background::new(c);
    let prim = Primordial::new(c);
    let mut cmb = Vec::new();
    let mut transfer_meta = Value::Null;
    if !sc.experiments.is_empty() {
        let pieces = cache.get(sc, &bg, settings.parallel, progress)?;
        transfer_meta = pieces.meta.clone();
        for e in &sc.experiments {
            progress(&format!("CMB bispectrum Fisher: {}", e.name));
            let p = pieces
                .plan
                .with_experiment(&pieces.table, &prim, e, c.params().t_cmb_k);
            let forecast = cmb_fisher_with_plan(&p, &sc.lmax, settings.parallel);
            cmb.push(CmbResult {
                experiment: e.clone(),
                forecast,
            });
        }
    }
    let mut surveys = Vec::new();
    if !sc.surveys.is_empty() {
        let power = LinearPower::eisenstein_hu(c);
        let shapes: Vec<ShapeInput> = sc
            .shapes
            .iter()
            .map(|&s| ShapeInput::new(s, prim))
            .collect();
        let kmax_mpc: Vec<f64> = sc.kmax_h_mpc.iter().map(|k| k * c.h()).collect();
        let st = SurveySettings {
            parallel: settings.parallel,
            ..settings.survey
        };
        for s in &sc.surveys {
            progress(&format!("survey Fisher: {}", s.name));
            let forecast = survey_fisher(s, &power, &bg, &shapes, &kmax_mpc, &st);
            surveys.push(SurveyResult {
                survey: s.clone(),
                forecast,
            });
        }
    }
    Ok(RunResult {
        scenario: sc.clone(),
        cmb,
        surveys,
        transfer: transfer_meta,
    })
}
