//! Well-tempered metadynamics (Barducci, Bussi & Parrinello, PRL 100, 020603, 2008) on
//! one or two collective variables, driven by BAOAB Langevin dynamics.
//!
//! Every `pace` steps a Gaussian hill is added at the current CV values s_t, with height
//! w₀ · exp(−V(s_t, t) / (kT (γ − 1))), where γ is the bias factor and kT the sampling
//! temperature (the campaign's kT times `temperature_factor`). The bias is the exact sum
//! of hills (a list, no interpolation); the bias force −(∂V/∂s)·∇s is added to the
//! model's forces.
//!
//! For reweighting, every saved frame records its CV values, the bias V(s(x_t), t) that
//! was acting when the frame was generated (before any hill deposited at that step) and
//! the Tiwary–Parrinello offset (J. Phys. Chem. B 119, 736, 2015)
//! c(t) = kT ln[∫ds exp(γ V(s,t) / ((γ−1) kT)) / ∫ds exp(V(s,t) / ((γ−1) kT))],
//! computed on the user's CV grid. An unbiased average then uses the weights
//! w_t = exp((V(s(x_t), t) − c(t)) / kT), with kT = [`MetadRun::reweight_kt`].

use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use super::langevin::{Baoab, LangevinParams};
use super::{check_start, Trajectory};
use crate::cv::CollectiveVariable;
use crate::energy::EnergyModel;
use crate::error::{require, PhysicsError};

/// One axis of the grid on which c(t) is integrated: `bins` cells covering
/// [min, max], evaluated at the cell centres.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GridAxis {
    /// Lower end of the CV range.
    pub min: f64,
    /// Upper end of the CV range.
    pub max: f64,
    /// Number of cells.
    pub bins: usize,
}

impl GridAxis {
    /// Centre of cell `i`.
    pub fn centre(&self, i: usize) -> f64 {
        self.min + (i as f64 + 0.5) * (self.max - self.min) / self.bins as f64
    }
}

/// Parameters of a well-tempered metadynamics run (the BAOAB keys plus the bias keys).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct MetadParams {
    /// Number of time steps.
    pub n_steps: u64,
    /// Time step h.
    pub dt: f64,
    /// Friction γ_L of the Langevin thermostat.
    pub friction: f64,
    /// Save every `save_stride`-th step.
    pub save_stride: u64,
    /// The dynamics run at kT · temperature_factor.
    pub temperature_factor: f64,
    /// One or two collective variables.
    pub cvs: Vec<CollectiveVariable>,
    /// Initial hill height w₀ (energy units).
    pub hill_height: f64,
    /// Hill width σ per CV.
    pub hill_widths: Vec<f64>,
    /// Steps between hills.
    pub pace: u64,
    /// Bias factor γ > 1 (the well-tempered ΔT is (γ − 1) T).
    pub bias_factor: f64,
    /// One axis per CV for the c(t) integral; it should cover the explored CV range.
    pub grid: Vec<GridAxis>,
    /// Evaluate the bias and its gradient by cubic Hermite interpolation of the values
    /// and exact derivatives kept on the grid nodes (cost independent of the number of
    /// hills) instead of summing every hill (exact, cost growing with the hills).
    /// Outside the grid's node range the exact sum is used. Default false.
    pub interpolate_bias: bool,
}

impl Default for MetadParams {
    fn default() -> Self {
        let l = LangevinParams::default();
        MetadParams {
            n_steps: l.n_steps,
            dt: l.dt,
            friction: l.friction,
            save_stride: l.save_stride,
            temperature_factor: l.temperature_factor,
            cvs: Vec::new(),
            hill_height: 1.0,
            hill_widths: Vec::new(),
            pace: 100,
            bias_factor: 10.0,
            grid: Vec::new(),
            interpolate_bias: false,
        }
    }
}

impl MetadParams {
    /// The Langevin part of the parameters.
    pub fn langevin(&self) -> LangevinParams {
        LangevinParams {
            n_steps: self.n_steps,
            dt: self.dt,
            friction: self.friction,
            save_stride: self.save_stride,
            temperature_factor: self.temperature_factor,
        }
    }

    /// Checks the parameters against a model, naming the first bad one.
    pub fn validate(&self, dim: usize, particle_dims: Option<usize>) -> Result<(), PhysicsError> {
        self.langevin().validate()?;
        let n = self.cvs.len();
        require(
            n == 1 || n == 2,
            "cvs",
            format!("needs one or two collective variables, not {n}"),
        )?;
        for cv in &self.cvs {
            cv.validate(dim, particle_dims)?;
        }
        require(
            self.hill_widths.len() == n,
            "hill_widths",
            format!("needs one width per CV ({n})"),
        )?;
        require(
            self.hill_widths.iter().all(|w| w.is_finite() && *w > 0.0),
            "hill_widths",
            "must be positive",
        )?;
        require(
            self.hill_height.is_finite() && self.hill_height > 0.0,
            "hill_height",
            "must be positive",
        )?;
        require(self.pace > 0, "pace", "must be positive")?;
        require(
            self.bias_factor.is_finite() && self.bias_factor > 1.0,
            "bias_factor",
            "must be above 1",
        )?;
        require(
            self.grid.len() == n,
            "grid",
            format!("needs one axis per CV ({n})"),
        )?;
        for a in &self.grid {
            require(
                a.min.is_finite() && a.max > a.min,
                "grid",
                "each axis needs min < max",
            )?;
            require(
                a.bins >= 2 && a.bins <= 100_000,
                "grid",
                "each axis needs 2 to 100000 bins",
            )?;
        }
        Ok(())
    }
}

/// The bias as a list of Gaussian hills V(s) = Σ_h w_h exp(−Σ_k (s_k − c_hk)² / 2σ_k²).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Bias {
    /// Number of collective variables.
    pub n_cv: usize,
    /// Hill width σ_k per CV.
    pub widths: Vec<f64>,
    /// Hill centres, `[n_hills, n_cv]`.
    pub centres: Vec<f64>,
    /// Hill heights, `[n_hills]`.
    pub heights: Vec<f64>,
    /// The step at which each hill was deposited, `[n_hills]`.
    pub deposited_at: Vec<u64>,
    /// Bias factor γ.
    pub bias_factor: f64,
    /// Sampling temperature kT of the run.
    pub kt: f64,
}

impl Bias {
    /// An empty bias.
    fn new(widths: &[f64], bias_factor: f64, kt: f64) -> Bias {
        Bias {
            n_cv: widths.len(),
            widths: widths.to_vec(),
            centres: Vec::new(),
            heights: Vec::new(),
            deposited_at: Vec::new(),
            bias_factor,
            kt,
        }
    }

    /// Number of hills.
    pub fn n_hills(&self) -> usize {
        self.heights.len()
    }

    /// V(s).
    pub fn value(&self, s: &[f64]) -> f64 {
        let mut g = [0.0; 2];
        self.value_and_gradient(s, &mut g[..self.n_cv])
    }

    /// V(s), with ∂V/∂s_k written into `grad`.
    pub fn value_and_gradient(&self, s: &[f64], grad: &mut [f64]) -> f64 {
        grad.iter_mut().for_each(|g| *g = 0.0);
        let mut v = 0.0;
        for (h, w) in self.heights.iter().enumerate() {
            let c = &self.centres[h * self.n_cv..(h + 1) * self.n_cv];
            let mut arg = 0.0;
            for k in 0..self.n_cv {
                let d = (s[k] - c[k]) / self.widths[k];
                arg += d * d;
            }
            let g = w * (-0.5 * arg).exp();
            v += g;
            for k in 0..self.n_cv {
                grad[k] -= g * (s[k] - c[k]) / (self.widths[k] * self.widths[k]);
            }
        }
        v
    }

    /// V on every point of the grid (row-major, the first axis slowest).
    pub fn on_grid(&self, axes: &[GridAxis]) -> Vec<f64> {
        grid_points(axes).iter().map(|s| self.value(s)).collect()
    }

    /// The well-tempered free-energy estimate F(s) = −γ/(γ − 1) · V(s) on the grid,
    /// shifted so that its minimum is zero.
    pub fn free_energy_on_grid(&self, axes: &[GridAxis]) -> Vec<f64> {
        let f = self.bias_factor / (self.bias_factor - 1.0);
        let mut out: Vec<f64> = self.on_grid(axes).iter().map(|v| -f * v).collect();
        let min = out.iter().cloned().fold(f64::INFINITY, f64::min);
        out.iter_mut().for_each(|v| *v -= min);
        out
    }

    /// The Tiwary–Parrinello offset c(t) of this bias on the grid.
    pub fn c_of_t(&self, axes: &[GridAxis]) -> f64 {
        tiwary_c(&self.on_grid(axes), self.bias_factor, self.kt)
    }

    /// Adds a hill and returns its height.
    fn deposit(&mut self, s: &[f64], w0: f64, step: u64) -> f64 {
        let v = self.value(s);
        let w = w0 * (-v / ((self.bias_factor - 1.0) * self.kt)).exp();
        self.centres.extend_from_slice(s);
        self.heights.push(w);
        self.deposited_at.push(step);
        w
    }
}

/// Every grid point's CV values, the first axis slowest.
fn grid_points(axes: &[GridAxis]) -> Vec<Vec<f64>> {
    match axes {
        [a] => (0..a.bins).map(|i| vec![a.centre(i)]).collect(),
        [a, b] => (0..a.bins)
            .flat_map(|i| (0..b.bins).map(move |j| vec![a.centre(i), b.centre(j)]))
            .collect(),
        _ => Vec::new(),
    }
}

/// ln Σ exp(a_i), stable for large arguments.
fn log_sum_exp(a: impl Iterator<Item = f64> + Clone) -> f64 {
    let m = a.clone().fold(f64::NEG_INFINITY, f64::max);
    if !m.is_finite() {
        return m;
    }
    m + a.map(|v| (v - m).exp()).sum::<f64>().ln()
}

/// c = kT ln[Σ exp(γ V / ((γ−1) kT)) / Σ exp(V / ((γ−1) kT))] over grid values V (the
/// cell volume cancels).
fn tiwary_c(grid_v: &[f64], gamma: f64, kt: f64) -> f64 {
    let d = (gamma - 1.0) * kt;
    let num = log_sum_exp(grid_v.iter().map(|v| gamma * v / d));
    let den = log_sum_exp(grid_v.iter().map(|v| v / d));
    kt * (num - den)
}

/// The bias on the grid nodes: values V, first derivatives and (for two CVs) the mixed
/// second derivative, each updated exactly when a hill is added, so that cubic Hermite
/// interpolation reproduces V to O(h⁴) with a continuous gradient.
#[derive(Debug, Clone)]
struct BiasGrid {
    axes: Vec<GridAxis>,
    v: Vec<f64>,
    d1: Vec<f64>,
    d2: Vec<f64>,
    d12: Vec<f64>,
}

/// Cubic Hermite basis on [0, 1] for (value at 0, slope at 0, value at 1, slope at 1),
/// and its derivative in t.
fn hermite(t: f64) -> ([f64; 4], [f64; 4]) {
    let t2 = t * t;
    let t3 = t2 * t;
    (
        [
            2.0 * t3 - 3.0 * t2 + 1.0,
            t3 - 2.0 * t2 + t,
            -2.0 * t3 + 3.0 * t2,
            t3 - t2,
        ],
        [
            6.0 * t2 - 6.0 * t,
            3.0 * t2 - 4.0 * t + 1.0,
            -6.0 * t2 + 6.0 * t,
            3.0 * t2 - 2.0 * t,
        ],
    )
}

impl BiasGrid {
    fn new(axes: &[GridAxis]) -> BiasGrid {
        let n: usize = axes.iter().map(|a| a.bins).product();
        BiasGrid {
            axes: axes.to_vec(),
            v: vec![0.0; n],
            d1: vec![0.0; n],
            d2: vec![0.0; if axes.len() == 2 { n } else { 0 }],
            d12: vec![0.0; if axes.len() == 2 { n } else { 0 }],
        }
    }

    /// Adds a Gaussian hill of height `w` at `centre` with `widths` to every node.
    fn add_hill(&mut self, centre: &[f64], w: f64, widths: &[f64]) {
        match self.axes.as_slice() {
            [a] => {
                for i in 0..a.bins {
                    let x = (a.centre(i) - centre[0]) / widths[0];
                    let g = w * (-0.5 * x * x).exp();
                    self.v[i] += g;
                    self.d1[i] -= g * x / widths[0];
                }
            }
            [a, b] => {
                for i in 0..a.bins {
                    let x = (a.centre(i) - centre[0]) / widths[0];
                    for j in 0..b.bins {
                        let y = (b.centre(j) - centre[1]) / widths[1];
                        let g = w * (-0.5 * (x * x + y * y)).exp();
                        let k = i * b.bins + j;
                        self.v[k] += g;
                        self.d1[k] -= g * x / widths[0];
                        self.d2[k] -= g * y / widths[1];
                        self.d12[k] += g * x * y / (widths[0] * widths[1]);
                    }
                }
            }
            _ => {}
        }
    }

    /// The cell (left node index) and fractional position of `s` along `axis`, or
    /// `None` outside the node range.
    fn locate(axis: &GridAxis, s: f64) -> Option<(usize, f64, f64)> {
        let h = (axis.max - axis.min) / axis.bins as f64;
        let u = (s - axis.min) / h - 0.5;
        if !(u >= 0.0 && u <= (axis.bins - 1) as f64) {
            return None;
        }
        let i = (u.floor() as usize).min(axis.bins - 2);
        Some((i, u - i as f64, h))
    }

    /// The interpolated V(s) with ∂V/∂s in `grad`, or `None` outside the grid.
    fn interpolate(&self, s: &[f64], grad: &mut [f64]) -> Option<f64> {
        match self.axes.as_slice() {
            [a] => {
                let (i, t, h) = Self::locate(a, s[0])?;
                let (b, db) = hermite(t);
                let vals = [self.v[i], h * self.d1[i], self.v[i + 1], h * self.d1[i + 1]];
                grad[0] = (0..4).map(|k| db[k] * vals[k]).sum::<f64>() / h;
                Some((0..4).map(|k| b[k] * vals[k]).sum())
            }
            [ax, ay] => {
                let (i, t, hx) = Self::locate(ax, s[0])?;
                let (j, u, hy) = Self::locate(ay, s[1])?;
                let (bx, dbx) = hermite(t);
                let (by, dby) = hermite(u);
                // Per node corner: value basis a (bx[0] or bx[2]) and slope basis b
                // (bx[1] or bx[3]) in x, likewise in y.
                let mut v = 0.0;
                let mut gx = 0.0;
                let mut gy = 0.0;
                for (ci, di) in [(0usize, 0usize), (1, 2)] {
                    let ax_v = bx[di];
                    let ax_s = hx * bx[di + 1];
                    let ax_dv = dbx[di] / hx;
                    let ax_ds = dbx[di + 1];
                    for (cj, dj) in [(0usize, 0usize), (1, 2)] {
                        let ay_v = by[dj];
                        let ay_s = hy * by[dj + 1];
                        let ay_dv = dby[dj] / hy;
                        let ay_ds = dby[dj + 1];
                        let k = (i + ci) * ay.bins + (j + cj);
                        let (f, fx, fy, fxy) = (self.v[k], self.d1[k], self.d2[k], self.d12[k]);
                        v += ax_v * ay_v * f
                            + ax_s * ay_v * fx
                            + ax_v * ay_s * fy
                            + ax_s * ay_s * fxy;
                        gx += ax_dv * ay_v * f
                            + ax_ds * ay_v * fx
                            + ax_dv * ay_s * fy
                            + ax_ds * ay_s * fxy;
                        gy += ax_v * ay_dv * f
                            + ax_s * ay_dv * fx
                            + ax_v * ay_ds * fy
                            + ax_s * ay_ds * fxy;
                    }
                }
                grad[0] = gx;
                grad[1] = gy;
                Some(v)
            }
            _ => None,
        }
    }
}

/// A bias laid onto a grid and evaluated by the same cubic Hermite interpolation the
/// dynamics use with `interpolate_bias = true`; for checking the interpolation against
/// the exact hill sum, and for cheap evaluation of a final bias.
#[derive(Debug, Clone)]
pub struct InterpolatedBias {
    grid: BiasGrid,
}

impl InterpolatedBias {
    /// Lays every hill of `bias` onto the grid `axes` (one axis per CV).
    pub fn new(bias: &Bias, axes: &[GridAxis]) -> InterpolatedBias {
        let mut grid = BiasGrid::new(axes);
        for h in 0..bias.n_hills() {
            grid.add_hill(
                &bias.centres[h * bias.n_cv..(h + 1) * bias.n_cv],
                bias.heights[h],
                &bias.widths,
            );
        }
        InterpolatedBias { grid }
    }

    /// V(s) with ∂V/∂s in `grad`, or `None` outside the grid's node range.
    pub fn value_and_gradient(&self, s: &[f64], grad: &mut [f64]) -> Option<f64> {
        self.grid.interpolate(s, grad)
    }
}

/// A finished metadynamics run.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MetadRun {
    /// Saved frames with their unbiased energies, last state and cost.
    pub trajectory: Trajectory,
    /// Number of collective variables.
    pub n_cv: usize,
    /// CV values per saved frame, `[n_frames, n_cv]`.
    pub cv_values: Vec<f64>,
    /// Bias V(s(x_t), t) acting on each saved frame, `[n_frames]`.
    pub bias: Vec<f64>,
    /// Tiwary–Parrinello c(t) at each saved frame, `[n_frames]`.
    pub c_t: Vec<f64>,
    /// The bias at the end of the run.
    pub final_bias: Bias,
    /// c(t) of the final bias.
    pub final_c: f64,
    /// The grid c(t) was integrated on.
    pub grid: Vec<GridAxis>,
    /// kT in the reweighting factor exp((V − c)/kT): the sampling temperature.
    pub reweight_kt: f64,
    /// Momenta at the end.
    pub final_momenta: Vec<f64>,
}

impl MetadRun {
    /// The unnormalised log-weights (V − c)/kT of the saved frames, for reweighting to
    /// the unbiased distribution at the sampling temperature.
    pub fn log_weights(&self) -> Vec<f64> {
        self.bias
            .iter()
            .zip(&self.c_t)
            .map(|(v, c)| (v - c) / self.reweight_kt)
            .collect()
    }
}

/// The CV values at `q` and the bias force −Σ_k (∂V/∂s_k) ∇s_k added to `f`; returns
/// the bias value.
#[allow(clippy::too_many_arguments)]
fn apply_bias(
    cvs: &[CollectiveVariable],
    pd: Option<usize>,
    bias: &Bias,
    grid: Option<&BiasGrid>,
    q: &[f64],
    f: &mut [f64],
    s: &mut [f64],
    grads: &mut [Vec<f64>],
) -> f64 {
    for (k, cv) in cvs.iter().enumerate() {
        s[k] = cv.value_and_gradient(q, pd, &mut grads[k]);
    }
    let mut dv = [0.0; 2];
    let v = match grid.and_then(|g| g.interpolate(s, &mut dv[..cvs.len()])) {
        Some(v) => v,
        None => bias.value_and_gradient(s, &mut dv[..cvs.len()]),
    };
    for (k, g) in grads.iter().enumerate() {
        if dv[k] != 0.0 {
            for (fi, gi) in f.iter_mut().zip(g) {
                *fi -= dv[k] * gi;
            }
        }
    }
    v
}

/// Runs well-tempered metadynamics from `x0` at temperature `kt · temperature_factor`.
pub fn metadynamics(
    model: &dyn EnergyModel,
    x0: &[f64],
    kt: f64,
    params: &MetadParams,
    rng: &mut ChaCha8Rng,
) -> Result<MetadRun, PhysicsError> {
    let kt_run = check_start(model, x0, kt, params.temperature_factor)?;
    let pd = model.particle_dims();
    params.validate(model.dim(), pd)?;
    let n_cv = params.cvs.len();
    let lp = params.langevin();
    let mut bias = Bias::new(&params.hill_widths, params.bias_factor, kt_run);
    let mut grid = BiasGrid::new(&params.grid);
    let mut c_now = 0.0;
    let mut s = vec![0.0; n_cv];
    let mut grads = vec![vec![0.0; x0.len()]; n_cv];
    let mut st = Baoab::new(x0, &lp, kt_run, rng);
    st.energy = model.energy_and_forces_of(&st.q, &mut st.f)?;
    if !st.finite() {
        return Err(PhysicsError::NonFinite {
            what: "metadynamics start",
            step: 0,
        });
    }
    let interp = params.interpolate_bias;
    apply_bias(
        &params.cvs,
        pd,
        &bias,
        None,
        &st.q,
        &mut st.f,
        &mut s,
        &mut grads,
    );
    let n_frames = (params.n_steps / params.save_stride) as usize;
    let mut traj = Trajectory::new(x0.len(), n_frames);
    let mut cv_values = Vec::with_capacity(n_frames * n_cv);
    let mut bias_at = Vec::with_capacity(n_frames);
    let mut c_t = Vec::with_capacity(n_frames);
    for step in 1..=params.n_steps {
        st.first_half(rng);
        st.energy = model.energy_and_forces_of(&st.q, &mut st.f)?;
        if !st.finite() {
            return Err(PhysicsError::NonFinite {
                what: "metadynamics",
                step,
            });
        }
        let g = if interp { Some(&grid) } else { None };
        let v = apply_bias(
            &params.cvs,
            pd,
            &bias,
            g,
            &st.q,
            &mut st.f,
            &mut s,
            &mut grads,
        );
        st.second_half();
        if step % params.save_stride == 0 {
            traj.save(&st.q, st.energy, pd);
            cv_values.extend_from_slice(&s);
            bias_at.push(v);
            c_t.push(c_now);
        }
        if step % params.pace == 0 {
            let w = bias.deposit(&s, params.hill_height, step);
            grid.add_hill(&s, w, &params.hill_widths);
            c_now = tiwary_c(&grid.v, params.bias_factor, kt_run);
        }
    }
    traj.n_evals = params.n_steps + 1;
    traj.final_energy = st.energy;
    traj.final_config = st.q;
    Ok(MetadRun {
        trajectory: traj,
        n_cv,
        cv_values,
        bias: bias_at,
        c_t,
        final_bias: bias,
        final_c: c_now,
        grid: params.grid.clone(),
        reweight_kt: kt_run,
        final_momenta: st.p,
    })
}
