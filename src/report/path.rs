//! `tarn path`: the straight line between two states in the flow's latent space, pushed
//! through the flow into configuration space, with the energy along it; optionally
//! relaxed by a climbing-image nudged elastic band into a minimum-energy path, whose
//! highest point estimates the barrier (the saddle's energy).
//!
//! Owns: the path analysis of a finished (or stopped) campaign. Must not touch: the
//! engine; it reads the store.

use anyhow::Context;
use serde::Serialize;

use crate::flow::{Flow, Threading, Workspace};
use crate::physics::path::{neb, NebParams};
use crate::physics::{EnergyModel, SystemSpec};
use crate::spec::Campaign;
use crate::store::Store;

/// The path and what it says about the barrier.
#[derive(Debug, Serialize)]
pub struct LatentPath {
    pub from: u32,
    pub to: u32,
    /// Path parameter of each image, 0 at `from`, 1 at `to`.
    pub t: Vec<f64>,
    /// Images in configuration space `[n, dim]`, as pushed through the flow.
    pub images: Vec<f64>,
    pub energies: Vec<f64>,
    /// Highest energy along the flow's path, and its image.
    pub highest: f64,
    pub highest_image: usize,
    /// After relaxation (with `--relax`): energies, the saddle estimate, its
    /// coordinates, steps and whether the band converged.
    pub relaxed_energies: Option<Vec<f64>>,
    pub saddle_energy: Option<f64>,
    pub saddle: Option<Vec<f64>>,
    pub relax_converged: Option<bool>,
    pub energy_evals: u64,
}

/// Builds the path between states `from` and `to` with `n` images.
pub fn latent_path(
    store: &Store,
    from: u32,
    to: u32,
    n: usize,
    relax: bool,
) -> anyhow::Result<LatentPath> {
    anyhow::ensure!(n >= 3, "--images must be at least 3");
    let current = store.current_campaign()?;
    let meta = store.meta()?;
    let campaign = Campaign::parse(
        &current.path,
        &current.text,
        std::path::Path::new(&meta.base_dir),
    )
    .map_err(|e| anyhow::anyhow!("{e}"))?;
    let states = store.states()?;
    let find = |id: u32| {
        states
            .iter()
            .find(|s| s.id == id)
            .with_context(|| format!("no state {id} in the catalogue (it has {})", states.len()))
    };
    let (a, b) = (find(from)?, find(to)?);
    let last = store.last_round()?.map(|r| r.round).unwrap_or(0);
    let bytes = crate::engine::inputs::model_up_to(store, last)?
        .context("the campaign has no flow model yet: a path needs a retrain stage that has run")?;
    let flow: Flow<f64> = Flow::<f32>::from_safetensors(&bytes)
        .map_err(|e| anyhow::anyhow!("model: {e}"))?
        .to_precision::<f64>();
    let spec: SystemSpec = serde_json::from_value(campaign.system.table.clone())?;
    let model: Box<dyn EnergyModel> = match &spec {
        SystemSpec::External { command, dim } => Box::new(
            crate::workers::external::ExternalProcess::start(command, *dim, spec.particle_dims())
                .map_err(anyhow::Error::msg)?,
        ),
        _ => spec.build()?,
    };
    let (d, dx) = (flow.dim(), flow.data_dim());
    let mut ws = Workspace::<f64>::new(&flow, n.max(2), 1, Threading::Auto)
        .map_err(|e| anyhow::anyhow!("{e}"))?;
    let ends: Vec<f64> = a
        .representative
        .iter()
        .chain(&b.representative)
        .copied()
        .collect();
    let mut z_ends = vec![0.0; 2 * d];
    let mut ld = vec![0.0; 2];
    ws.invert(&flow, &ends, &mut z_ends, &mut ld)
        .map_err(|e| anyhow::anyhow!("{e}"))?;
    let t: Vec<f64> = (0..n).map(|i| i as f64 / (n - 1) as f64).collect();
    let ze = &z_ends;
    let z: Vec<f64> = t
        .iter()
        .flat_map(|&s| (0..d).map(move |k| (1.0 - s) * ze[k] + s * ze[d + k]))
        .collect();
    let mut images = vec![0.0; n * dx];
    let mut ld = vec![0.0; n];
    ws.generate(&flow, &z, &mut images, &mut ld)
        .map_err(|e| anyhow::anyhow!("{e}"))?;
    // The ends are the states' minima themselves (the flow's round trip is not exact).
    images[..dx].copy_from_slice(&a.representative);
    images[(n - 1) * dx..].copy_from_slice(&b.representative);
    let mut energies = vec![0.0; n];
    model.evaluate(&images, &mut energies, None)?;
    let highest_image = (0..n)
        .max_by(|&i, &j| energies[i].total_cmp(&energies[j]))
        .unwrap_or(0);
    let mut out = LatentPath {
        from,
        to,
        t,
        highest: energies[highest_image],
        highest_image,
        images,
        energies,
        relaxed_energies: None,
        saddle_energy: None,
        saddle: None,
        relax_converged: None,
        energy_evals: n as u64,
    };
    if relax {
        let r = neb(model.as_ref(), &out.images, &NebParams::default())?;
        out.saddle_energy = Some(r.energies[r.climbing]);
        out.saddle = Some(r.images[r.climbing * dx..(r.climbing + 1) * dx].to_vec());
        out.relaxed_energies = Some(r.energies);
        out.relax_converged = Some(r.converged);
        out.energy_evals += r.n_evals;
    }
    Ok(out)
}

/// The path as a table for people.
pub fn path_text(p: &LatentPath) -> String {
    let mut s = format!(
        "path from state {} to state {} through the flow's latent space\n",
        p.from, p.to
    );
    s.push_str("  image      t        energy   relaxed energy\n");
    for i in 0..p.t.len() {
        let relaxed = p
            .relaxed_energies
            .as_ref()
            .map(|r| format!("{:>14.6}", r[i]))
            .unwrap_or_default();
        s.push_str(&format!(
            "  {:>5}  {:>5.3}  {:>12.6}  {relaxed}\n",
            i, p.t[i], p.energies[i]
        ));
    }
    s.push_str(&format!(
        "highest point on the flow's path: {:.6} (image {})\n",
        p.highest, p.highest_image
    ));
    if let (Some(e), Some(ok)) = (p.saddle_energy, p.relax_converged) {
        s.push_str(&format!(
            "relaxed (climbing-image nudged elastic band): saddle estimate {e:.6}{}\n",
            if ok {
                ""
            } else {
                " (the band did not reach its force tolerance; treat as approximate)"
            }
        ));
    }
    s
}
