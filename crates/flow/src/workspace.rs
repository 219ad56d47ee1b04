//! Batched passes over a flow on a fixed number of threads: generation, inversion,
//! log-densities, and the loss gradients of training (maximum likelihood and reverse
//! KL). A `Workspace` owns the preallocated chunk tapes, the per-chunk gradients, the
//! team of threads that runs the chunks, and a private rayon pool (reductions, the
//! optimiser, GEMM splitting).
//!
//! Threading is either by batch (the rows are cut into one contiguous chunk per thread,
//! each chunk runs the whole flow with single-threaded GEMMs on its own thread of the
//! team, and the chunk gradients are summed in chunk order) or by GEMM (one chunk, every matrix product split over the
//! threads). Both give results that depend only on the thread count, never on
//! scheduling.

use crate::flow::Flow;
use crate::real::{add_assign, Real};
use crate::tape::Tape;
use crate::team::Team;
use crate::FlowError;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use tarn_physics::EnergyModel;

/// How a workspace uses its threads.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum Threading {
    /// Batch splitting, except GEMM splitting for wide conditioners (H >= 384) when the
    /// batch leaves fewer than 64 rows per thread.
    #[default]
    Auto,
    /// One chunk of rows per thread.
    Batch,
    /// One chunk; each GEMM uses all threads.
    Gemm,
}

/// The reverse-KL term's settings for one temperature.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct KlTerm {
    /// 1 / (kT * temperature factor), in inverse energy units: u = beta * E.
    pub beta: f64,
    /// Temperature factor tau of the latent (z ~ N(0, tau I)); enters only the reported
    /// loss value through log N(z; 0, tau).
    pub temperature_factor: f64,
    /// Reduced-energy cutoff c of the regularisation u -> c + ln(1 + u - c) above c.
    pub cutoff: f64,
}

/// What one reverse-KL evaluation measured.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct KlStats {
    /// Mean of rho(u(x)) + log q(x) over the finite rows: an upper bound of -ln Z when
    /// no regularisation is active.
    pub loss: f64,
    /// Mean reduced energy (unregularised) over the finite rows.
    pub mean_reduced_energy: f64,
    /// Rows whose energy or forces were not finite (they contribute no energy gradient).
    pub n_nonfinite: usize,
    /// Energy evaluations made (one per row).
    pub n_evaluations: usize,
}

/// The regularised reduced energy rho(u) and its derivative: the identity up to the
/// cutoff c, then c + ln(1 + u - c), which keeps clashing configurations (u of 1e10 and
/// more) from dominating the loss and its gradient while still pushing them down.
pub fn regularise_energy(u: f64, cutoff: f64) -> (f64, f64) {
    if u <= cutoff {
        (u, 1.0)
    } else {
        let e = u - cutoff;
        (cutoff + e.ln_1p(), 1.0 / (1.0 + e))
    }
}

/// Preallocated buffers and threads for batched flow passes.
pub struct Workspace<T: Real> {
    tapes: Vec<Tape<T>>,
    grads: Vec<Vec<T>>,
    /// Runs the chunks of batch splitting (the caller and threads - 1 helpers).
    team: Option<Team>,
    /// Parallel reductions, the optimiser, and GEMM splitting.
    pool: Option<rayon::ThreadPool>,
    threads: usize,
    shape: (usize, usize, usize),
}

impl<T: Real> std::fmt::Debug for Workspace<T> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Workspace")
            .field("chunks", &self.tapes.len())
            .field("chunk_rows", &self.tapes[0].cap)
            .field("threads", &self.threads)
            .finish()
    }
}

impl<T: Real> Workspace<T> {
    /// Buffers for passes of `flow` over batches processed `batch_rows` rows at a time
    /// (larger inputs are processed in successive blocks), on `threads` threads.
    pub fn new(
        flow: &Flow<T>,
        batch_rows: usize,
        threads: usize,
        threading: Threading,
    ) -> Result<Self, FlowError> {
        let threads = threads.max(1);
        let batch_rows = batch_rows.max(1);
        let mode = match threading {
            // Splitting each product pays a synchronisation per GEMM; it wins only when
            // the rows per thread are too few for an efficient single-threaded GEMM.
            Threading::Auto
                if flow.spec.hidden_width >= 384
                    && threads > 1
                    && batch_rows / threads < MIN_CHUNK_ROWS =>
            {
                Threading::Gemm
            }
            Threading::Auto => Threading::Batch,
            m => m,
        };
        let (n_chunks, gemm_threads) = match mode {
            Threading::Gemm => (1, threads),
            _ => (threads, 1),
        };
        let cap = batch_rows.div_ceil(n_chunks);
        let tapes = (0..n_chunks)
            .map(|_| Tape::new(flow, cap, gemm_threads))
            .collect();
        let grads = (0..n_chunks)
            .map(|_| vec![T::zero(); flow.n_params()])
            .collect();
        let pool = if threads > 1 {
            Some(
                rayon::ThreadPoolBuilder::new()
                    .num_threads(threads)
                    .build()
                    .map_err(|e| FlowError::Threads(e.to_string()))?,
            )
        } else {
            None
        };
        let team = if n_chunks > 1 {
            Some(Team::new(n_chunks - 1).map_err(|e| FlowError::Threads(e.to_string()))?)
        } else {
            None
        };
        Ok(Workspace {
            tapes,
            grads,
            team,
            pool,
            threads,
            shape: (flow.dim(), flow.data_dim(), flow.n_params()),
        })
    }

    /// Number of threads.
    pub fn threads(&self) -> usize {
        self.threads
    }

    /// Rows processed per block (all chunks together).
    pub fn block_rows(&self) -> usize {
        self.tapes.len() * self.tapes[0].cap
    }

    fn check_flow(&self, flow: &Flow<T>) -> Result<(), FlowError> {
        if (flow.dim(), flow.data_dim(), flow.n_params()) != self.shape {
            return Err(FlowError::Spec(
                "workspace was built for a flow of another shape".into(),
            ));
        }
        Ok(())
    }

    /// Runs `f(tape, grad, first_row, rows)` on every non-empty chunk of the block of `m`
    /// rows starting at `start`, in parallel, and returns the first error in chunk order.
    pub(crate) fn run_block<F>(&mut self, start: usize, m: usize, f: F) -> Result<(), FlowError>
    where
        F: Fn(&mut Tape<T>, &mut [T], usize, usize) -> Result<(), FlowError> + Sync,
    {
        let nt = self.tapes.len();
        let per = m.div_ceil(nt);
        let job = |(c, (tape, grad)): (usize, (&mut Tape<T>, &mut Vec<T>))| {
            let r0 = start + c * per;
            let rows = per.min((start + m).saturating_sub(r0));
            if rows > 0 {
                if let Err(e) = f(tape, grad, r0, rows) {
                    tape.err = Some(e);
                }
                tape.rows_done += rows;
            }
        };
        match (&mut self.team, &self.pool) {
            (Some(team), _) if nt > 1 => {
                let (tapes, grads) = (
                    ChunkPtr(self.tapes.as_mut_ptr()),
                    ChunkPtr(self.grads.as_mut_ptr()),
                );
                let run_chunk = |c: usize| {
                    // SAFETY: the team runs each chunk index once per call, on one thread,
                    // and `run` returns only when all have finished, so these are the
                    // only references to tape c and gradient c while they live.
                    let (tape, grad) = unsafe { (&mut *tapes.at(c), &mut *grads.at(c)) };
                    job((c, (tape, grad)));
                };
                team.run(nt, &run_chunk);
            }
            (_, Some(pool)) => pool.install(|| {
                self.tapes
                    .iter_mut()
                    .zip(self.grads.iter_mut())
                    .enumerate()
                    .for_each(job)
            }),
            (_, None) => self
                .tapes
                .iter_mut()
                .zip(self.grads.iter_mut())
                .enumerate()
                .for_each(job),
        }
        for t in &mut self.tapes {
            if let Some(e) = t.err.take() {
                return Err(e);
            }
        }
        Ok(())
    }

    /// The chunks of the block of `m` rows at `start`: (chunk index, first row, rows).
    pub(crate) fn chunks(
        &self,
        start: usize,
        m: usize,
    ) -> impl Iterator<Item = (usize, usize, usize)> {
        let nt = self.tapes.len();
        let per = m.div_ceil(nt);
        (0..nt).filter_map(move |c| {
            let r0 = start + c * per;
            let rows = per.min((start + m).saturating_sub(r0));
            (rows > 0).then_some((c, r0, rows))
        })
    }

    fn blocks(&self, n: usize) -> impl Iterator<Item = (usize, usize)> {
        let b = self.block_rows();
        (0..n.div_ceil(b)).map(move |i| (i * b, b.min(n - i * b)))
    }

    fn reset(&mut self) {
        for t in &mut self.tapes {
            t.reset_written();
            t.rows_done = 0;
            t.stats = [0.0; 4];
        }
    }

    /// Writes the sum of the chunk gradients (in chunk order) into `out`.
    fn reduce_grads(&mut self, out: &mut [T]) {
        let used: Vec<usize> = (0..self.tapes.len())
            .filter(|&c| self.tapes[c].rows_done > 0)
            .collect();
        out.fill(T::zero());
        let grads = &self.grads;
        let sum_into = |(i, o): (usize, &mut [T])| {
            let off = i * REDUCE_CHUNK;
            for &c in &used {
                let len = o.len();
                add_assign(o, &grads[c][off..off + len]);
            }
        };
        match &self.pool {
            Some(pool) => pool.install(|| {
                out.par_chunks_mut(REDUCE_CHUNK)
                    .enumerate()
                    .for_each(sum_into)
            }),
            None => out.chunks_mut(REDUCE_CHUNK).enumerate().for_each(sum_into),
        }
    }

    /// Runs `f` on the workspace's pool (so that nested rayon work uses its threads).
    pub(crate) fn install<R: Send>(&self, f: impl FnOnce() -> R + Send) -> R {
        match &self.pool {
            Some(pool) => pool.install(f),
            None => f(),
        }
    }

    /// Generation x = f(z) of `n = z.len() / dim` rows, with log|det df/dz| per row
    /// (fixed layers included).
    pub fn generate(
        &mut self,
        flow: &Flow<T>,
        z: &[T],
        x: &mut [T],
        log_det: &mut [f64],
    ) -> Result<(), FlowError> {
        self.check_flow(flow)?;
        let (d, dx) = (flow.dim(), flow.data_dim());
        let n = rows_of(z, d, "z")?;
        expect_len(x, n * dx, "x")?;
        expect_len(log_det, n, "log_det")?;
        let fixed = flow.fixed_log_det();
        for (start, m) in self.blocks(n).collect::<Vec<_>>() {
            self.run_block(start, m, |tape, _, r0, rows| {
                tape.record = false;
                tape.state[..rows * d].copy_from_slice(&z[r0 * d..(r0 + rows) * d]);
                tape.generate(flow, rows);
                Ok(())
            })?;
            for (c, r0, rows) in self.chunks(start, m) {
                let t = &self.tapes[c];
                x[r0 * dx..(r0 + rows) * dx].copy_from_slice(&t.xbuf[..rows * dx]);
                for (o, &l) in log_det[r0..r0 + rows].iter_mut().zip(&t.logdet) {
                    *o = l.to64() + fixed;
                }
            }
        }
        Ok(())
    }

    /// Inversion z = f^{-1}(x) of `n = x.len() / data_dim` rows, with log|det df^{-1}/dx|
    /// per row (fixed layers included).
    pub fn invert(
        &mut self,
        flow: &Flow<T>,
        x: &[T],
        z: &mut [T],
        log_det: &mut [f64],
    ) -> Result<(), FlowError> {
        self.check_flow(flow)?;
        let (d, dx) = (flow.dim(), flow.data_dim());
        let n = rows_of(x, dx, "x")?;
        expect_len(z, n * d, "z")?;
        expect_len(log_det, n, "log_det")?;
        let fixed = flow.fixed_log_det();
        for (start, m) in self.blocks(n).collect::<Vec<_>>() {
            self.run_block(start, m, |tape, _, r0, rows| {
                tape.record = false;
                tape.xbuf[..rows * dx].copy_from_slice(&x[r0 * dx..(r0 + rows) * dx]);
                tape.invert(flow, rows);
                Ok(())
            })?;
            for (c, r0, rows) in self.chunks(start, m) {
                let t = &self.tapes[c];
                z[r0 * d..(r0 + rows) * d].copy_from_slice(&t.state[..rows * d]);
                for (o, &l) in log_det[r0..r0 + rows].iter_mut().zip(&t.logdet) {
                    *o = l.to64() - fixed;
                }
            }
        }
        Ok(())
    }

    /// log q(x) per row under the latent N(0, tau I), tau = `temperature_factor`.
    pub fn log_prob(
        &mut self,
        flow: &Flow<T>,
        x: &[T],
        temperature_factor: f64,
        out: &mut [f64],
    ) -> Result<(), FlowError> {
        let (d, dx) = (flow.dim(), flow.data_dim());
        let n = rows_of(x, dx, "x")?;
        expect_len(out, n, "log_prob")?;
        check_tau(temperature_factor)?;
        self.check_flow(flow)?;
        let fixed = flow.fixed_log_det();
        let norm = -0.5 * d as f64 * (2.0 * std::f64::consts::PI * temperature_factor).ln();
        for (start, m) in self.blocks(n).collect::<Vec<_>>() {
            self.run_block(start, m, |tape, _, r0, rows| {
                tape.record = false;
                tape.xbuf[..rows * dx].copy_from_slice(&x[r0 * dx..(r0 + rows) * dx]);
                tape.invert(flow, rows);
                Ok(())
            })?;
            for (c, r0, rows) in self.chunks(start, m) {
                let t = &self.tapes[c];
                for i in 0..rows {
                    let zz: f64 = t.state[i * d..(i + 1) * d]
                        .iter()
                        .map(|v| v.to64() * v.to64())
                        .sum();
                    out[r0 + i] = norm - 0.5 * zz / temperature_factor + t.logdet[i].to64() - fixed;
                }
            }
        }
        Ok(())
    }

    /// Mean negative log-likelihood of the rows of `x` under the standard latent, with its
    /// gradient with respect to the parameters written to `pgrad` and, if asked, with
    /// respect to `x` (of the mean) written to `xgrad`.
    pub fn nll_grad(
        &mut self,
        flow: &Flow<T>,
        x: &[T],
        pgrad: &mut [T],
        mut xgrad: Option<&mut [T]>,
    ) -> Result<f64, FlowError> {
        self.check_flow(flow)?;
        let (d, dx) = (flow.dim(), flow.data_dim());
        let n = rows_of(x, dx, "x")?;
        expect_len(pgrad, flow.n_params(), "parameter gradient")?;
        if let Some(g) = &xgrad {
            expect_len(g, n * dx, "x gradient")?;
        }
        if n == 0 {
            return Err(FlowError::Params(
                "no rows to evaluate the likelihood on".into(),
            ));
        }
        let scale = T::of(1.0 / n as f64);
        let want_x = xgrad.is_some();
        self.reset();
        for (start, m) in self.blocks(n).collect::<Vec<_>>() {
            self.run_block(start, m, |tape, grad, r0, rows| {
                tape.record = true;
                tape.xbuf[..rows * dx].copy_from_slice(&x[r0 * dx..(r0 + rows) * dx]);
                tape.invert(flow, rows);
                let mut nll = 0.0;
                for i in 0..rows {
                    let zr = &tape.state[i * d..(i + 1) * d];
                    let zz: f64 = zr.iter().map(|v| v.to64() * v.to64()).sum();
                    nll += 0.5 * zz - tape.logdet[i].to64();
                }
                tape.stats[0] += nll;
                for (g, &zv) in tape.grad[..rows * d]
                    .iter_mut()
                    .zip(&tape.state[..rows * d])
                {
                    *g = zv * scale;
                }
                tape.invert_backward(flow, rows, scale, grad, want_x);
                Ok(())
            })?;
            if let Some(g) = xgrad.as_deref_mut() {
                for (c, r0, rows) in self.chunks(start, m) {
                    g[r0 * dx..(r0 + rows) * dx].copy_from_slice(&self.tapes[c].gxbuf[..rows * dx]);
                }
            }
        }
        self.reduce_grads(pgrad);
        let total: f64 = self.tapes.iter().map(|t| t.stats[0]).sum();
        let constant = 0.5 * d as f64 * (2.0 * std::f64::consts::PI).ln() + flow.fixed_log_det();
        Ok(total / n as f64 + constant)
    }

    /// Reverse-KL loss of the latent rows `z` (drawn by the caller from N(0, tau I)):
    /// the mean of rho(beta E(f(z))) - log|det df/dz|, with its gradient with respect to
    /// the parameters written to `pgrad` and, if asked, with respect to `z` to `zgrad`.
    #[allow(clippy::too_many_arguments)]
    pub fn kl_grad(
        &mut self,
        flow: &Flow<T>,
        z: &[T],
        energy: &dyn EnergyModel,
        term: &KlTerm,
        pgrad: &mut [T],
        mut zgrad: Option<&mut [T]>,
    ) -> Result<KlStats, FlowError> {
        self.check_flow(flow)?;
        let (d, dx) = (flow.dim(), flow.data_dim());
        let n = rows_of(z, d, "z")?;
        expect_len(pgrad, flow.n_params(), "parameter gradient")?;
        if let Some(g) = &zgrad {
            expect_len(g, n * d, "z gradient")?;
        }
        if energy.dim() != dx {
            return Err(FlowError::Spec(format!(
                "energy model has dim {} but the flow's data_dim is {dx}",
                energy.dim()
            )));
        }
        if n == 0 {
            return Err(FlowError::Params(
                "no latent rows for the reverse-KL term".into(),
            ));
        }
        check_tau(term.temperature_factor)?;
        let scale = 1.0 / n as f64;
        let fixed = flow.fixed_log_det();
        let tau = term.temperature_factor;
        let norm = -0.5 * d as f64 * (2.0 * std::f64::consts::PI * tau).ln();
        self.reset();
        for (start, m) in self.blocks(n).collect::<Vec<_>>() {
            self.run_block(start, m, |tape, grad, r0, rows| {
                tape.record = true;
                tape.state[..rows * d].copy_from_slice(&z[r0 * d..(r0 + rows) * d]);
                tape.generate(flow, rows);
                for (o, v) in tape.x64[..rows * dx]
                    .iter_mut()
                    .zip(&tape.xbuf[..rows * dx])
                {
                    *o = v.to64();
                }
                energy.evaluate(
                    &tape.x64[..rows * dx],
                    &mut tape.e64[..rows],
                    Some(&mut tape.f64[..rows * dx]),
                )?;
                let (mut loss, mut usum, mut bad) = (0.0, 0.0, 0.0);
                for i in 0..rows {
                    let u = term.beta * tape.e64[i];
                    let fr = &tape.f64[i * dx..(i + 1) * dx];
                    let gr = &mut tape.gxbuf[i * dx..(i + 1) * dx];
                    if u.is_finite() && fr.iter().all(|v| v.is_finite()) {
                        let (rho, drho) = regularise_energy(u, term.cutoff);
                        let zz: f64 = z[(r0 + i) * d..(r0 + i + 1) * d]
                            .iter()
                            .map(|v| v.to64().powi(2))
                            .sum();
                        loss += rho - (tape.logdet[i].to64() + fixed) + norm - 0.5 * zz / tau;
                        usum += u;
                        let c = -drho * term.beta * scale;
                        for (g, &f) in gr.iter_mut().zip(fr) {
                            *g = T::of(c * f);
                        }
                    } else {
                        bad += 1.0;
                        gr.fill(T::zero());
                    }
                }
                tape.stats[0] += loss;
                tape.stats[1] += usum;
                tape.stats[2] += bad;
                tape.generate_backward(flow, rows, T::of(-scale), grad);
                Ok(())
            })?;
            if let Some(g) = zgrad.as_deref_mut() {
                for (c, r0, rows) in self.chunks(start, m) {
                    g[r0 * d..(r0 + rows) * d].copy_from_slice(&self.tapes[c].grad[..rows * d]);
                }
            }
        }
        self.reduce_grads(pgrad);
        let sum = |k: usize| self.tapes.iter().map(|t| t.stats[k]).sum::<f64>();
        let n_bad = sum(2) as usize;
        let good = (n - n_bad).max(1) as f64;
        Ok(KlStats {
            loss: sum(0) / good,
            mean_reduced_energy: sum(1) / good,
            n_nonfinite: n_bad,
            n_evaluations: n,
        })
    }
}

impl<T: Real> Workspace<T> {
    /// Generation of the latent rows `z` followed by the energy of each result: writes
    /// x (as f64), log|det df/dz| (fixed layers included) and the energies (in the
    /// model's unit; no forces). Chunks call the energy model in parallel.
    pub(crate) fn generate_with_energy(
        &mut self,
        flow: &Flow<T>,
        z: &[T],
        energy: &dyn EnergyModel,
        x: &mut [f64],
        log_det: &mut [f64],
        e: &mut [f64],
    ) -> Result<(), FlowError> {
        self.check_flow(flow)?;
        let (d, dx) = (flow.dim(), flow.data_dim());
        let n = rows_of(z, d, "z")?;
        expect_len(x, n * dx, "x")?;
        expect_len(log_det, n, "log_det")?;
        expect_len(e, n, "energies")?;
        if energy.dim() != dx {
            return Err(FlowError::Spec(format!(
                "energy model has dim {} but the flow's data_dim is {dx}",
                energy.dim()
            )));
        }
        let fixed = flow.fixed_log_det();
        for (start, m) in self.blocks(n).collect::<Vec<_>>() {
            self.run_block(start, m, |tape, _, r0, rows| {
                tape.record = false;
                tape.state[..rows * d].copy_from_slice(&z[r0 * d..(r0 + rows) * d]);
                tape.generate(flow, rows);
                for (o, v) in tape.x64[..rows * dx]
                    .iter_mut()
                    .zip(&tape.xbuf[..rows * dx])
                {
                    *o = v.to64();
                }
                energy.evaluate(&tape.x64[..rows * dx], &mut tape.e64[..rows], None)?;
                Ok(())
            })?;
            for (c, r0, rows) in self.chunks(start, m) {
                let t = &self.tapes[c];
                x[r0 * dx..(r0 + rows) * dx].copy_from_slice(&t.x64[..rows * dx]);
                e[r0..r0 + rows].copy_from_slice(&t.e64[..rows]);
                for (o, &l) in log_det[r0..r0 + rows].iter_mut().zip(&t.logdet) {
                    *o = l.to64() + fixed;
                }
            }
        }
        Ok(())
    }
}

/// Fewest rows per thread for which `Threading::Auto` splits a wide conditioner's batch
/// rather than each product. Measured on 2 threads (H = 512, L = 12, B = 256, so 128
/// rows per thread): batch splitting ran training steps 14-24% and sampling 26-40%
/// faster than GEMM splitting.
const MIN_CHUNK_ROWS: usize = 64;

/// A pointer to the workspace's per-chunk buffers, handed to the team's threads (each
/// uses only its own chunk's element).
struct ChunkPtr<P>(*mut P);

impl<P> ChunkPtr<P> {
    /// Element `i` (the caller keeps `i` in bounds).
    fn at(&self, i: usize) -> *mut P {
        self.0.wrapping_add(i)
    }
}

// SAFETY: see `run_block`: every thread dereferences a different element, and the
// owner waits for all of them.
unsafe impl<P: Send> Sync for ChunkPtr<P> {}
unsafe impl<P: Send> Send for ChunkPtr<P> {}

/// Parameter count of one parallel reduction block (fixed, so sums never depend on
/// scheduling).
const REDUCE_CHUNK: usize = 1 << 14;

/// Rows of a row-major slice, or a shape error naming `what`.
pub(crate) fn rows_of<T>(v: &[T], cols: usize, what: &'static str) -> Result<usize, FlowError> {
    if cols == 0 || !v.len().is_multiple_of(cols) {
        return Err(FlowError::Shape {
            what,
            expected: cols,
            got: v.len(),
        });
    }
    Ok(v.len() / cols)
}

/// A shape error unless `v` has exactly `len` values.
pub(crate) fn expect_len<T>(v: &[T], len: usize, what: &'static str) -> Result<(), FlowError> {
    if v.len() != len {
        return Err(FlowError::Shape {
            what,
            expected: len,
            got: v.len(),
        });
    }
    Ok(())
}

/// Refuses temperature factors that are not finite and positive.
pub(crate) fn check_tau(tau: f64) -> Result<(), FlowError> {
    if !(tau.is_finite() && tau > 0.0) {
        return Err(FlowError::Params(format!(
            "temperature factor must be finite and > 0, got {tau}"
        )));
    }
    Ok(())
}
