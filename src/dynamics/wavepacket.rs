//! Exact reference solver: split-operator propagation of a nuclear wavepacket
//! on a one-dimensional two-state diabatic potential.
//!
//! The solver gives the numerically exact branching ratios (transmission and
//! reflection on each adiabatic state) against which surface-hopping
//! ensembles are validated, for example on Tully's three models
//! (J. Chem. Phys. 93, 1061 (1990)). Any one-dimensional two-state model can
//! be used through the [`Diabatic1D`] trait.
//!
//! # Equations (atomic units, ħ = 1)
//!
//! The two diabatic components ψ = (ψ₁, ψ₂) obey
//! i ∂ψ/∂t = [−(1/2m) ∂²/∂x² + W(x)] ψ with W(x) a real symmetric 2×2 matrix.
//! One step of length Δt uses the symmetric (Strang) splitting of the
//! split-operator method (J. Comput. Phys. 47, 412 (1982), from memory):
//!
//! ψ(t + Δt) ≈ e^{−iWΔt/2} F⁻¹ e^{−ip²Δt/2m} F e^{−iWΔt/2} ψ(t),
//!
//! with F the discrete Fourier transform on a periodic grid of N = 2ⁿ points
//! on [x_min, x_max), spacing Δx, and momenta p_j = 2πj/(NΔx) for
//! −N/2 ≤ j < N/2, so |p| < π/Δx. Each factor is unitary, so without
//! absorption the norm is conserved to rounding error; the splitting error is
//! O(Δt³) per step.
//!
//! The potential factor is evaluated exactly at each grid point. With
//! W = [[a, c], [c, b]], m = (a + b)/2, d = (a − b)/2 and Δ = √(d² + c²),
//! (W − m)² = Δ², so for τ = Δt/2
//!
//! e^{−iWτ} = e^{−imτ} [cos(Δτ) 1 − i (sin(Δτ)/Δ) (W − m)].
//!
//! # Initial state
//!
//! ψ(x, 0) = φ(x) u_s(x), with the Gaussian φ(x) ∝ exp(−(x − x₀)²/(4σ²) + ik₀x)
//! (|φ|² has standard deviation σ, the momentum density standard deviation
//! 1/(2σ)) and u_s(x) the local adiabatic eigenvector of W(x) of state s
//! (0 = lower, 1 = upper), whose sign is made continuous along the grid. The
//! packet is normalised on the grid.
//!
//! # Absorption and branching ratios
//!
//! In a layer of width w at each box edge the wavefunction is multiplied after
//! every step by the mask M(s) = cos(πs/2)^{Δt/(8 a.u.)}, with s ∈ [0, 1] the
//! depth into the layer (M = 1 outside the layers). The exponent scales with
//! Δt so that the mask corresponds to the same absorbing potential whatever the
//! step, and equals the usual cos^{1/8} for Δt = 1 a.u. Before the density
//! (1 − M²)|ψ|² is removed it is projected onto the local adiabatic states,
//! |u_i(x)ᵀψ(x)|² (1 − M²) Δx, and added to the channel of its side of the
//! box. The *reflected* side is the side of the centre of the interaction
//! region [x_l, x_r] on which x₀ lies; the other side is *transmitted*.
//!
//! Propagation stops at the first of: the norm on the grid falls below the
//! tolerance; the density inside the interaction region falls below the
//! tolerance once the free packet centre would have crossed the region
//! (what is left is outgoing on flat asymptotes); the maximum time. The density
//! still on the grid is then classified by side and adiabatic state in the same
//! way, so the four channels sum to one up to rounding. The density still
//! inside the interaction region at the end is reported as
//! [`ScatteringResult::unresolved`].
//!
//! # Landau–Zener
//!
//! [`landau_zener`] gives the Landau–Zener probability (Proc. R. Soc. A 137,
//! 696 (1932), from memory) of diabatic passage through a crossing at x_c, P = exp(−2π W₁₂² / (v |d(W₁₁ − W₂₂)/dx|)), with
//! v = k/m. For a packet that starts on the lower adiabatic state it is the
//! probability to leave on the upper one. It assumes linear diabats and a
//! constant coupling; for a localised coupling such as that of Tully's model 1
//! the exact result overtakes it at high momentum, where first-order
//! perturbation theory gives 1 − P ∝ 1/k² instead of ∝ 1/k (see the tests).

use std::f64::consts::PI;
use std::fmt;
use std::sync::Arc;

use num_complex::Complex64;
use rustfft::{Fft, FftPlanner};
use serde::{Deserialize, Serialize};
use thiserror::Error;

use crate::electronic::models::Tully;

/// How often (in steps) the stopping criteria are evaluated.
const CHECK_EVERY: usize = 10;
/// Half-width of the initial packet in units of σ that must fit in the
/// absorber-free part of the box.
const PACKET_HALF_WIDTH: f64 = 5.0;
/// Momentum margin of the resolution check in units of the momentum standard
/// deviation 1/(2σ).
const MOMENTUM_MARGIN: f64 = 6.0;
/// Reference time of the absorbing mask exponent (a.u.): M = cos(πs/2)^(Δt/8).
const MASK_TIME: f64 = 8.0;

/// A one-dimensional two-state model in a diabatic representation.
pub trait Diabatic1D {
    /// Nuclear mass (electron masses).
    fn mass(&self) -> f64;
    /// Diabatic matrix [[W₁₁, W₁₂], [W₁₂, W₂₂]] (hartree) at x (bohr).
    fn matrix(&self, x: f64) -> [[f64; 2]; 2];
    /// dW/dx (hartree/bohr); by default a central finite difference.
    fn matrix_derivative(&self, x: f64) -> [[f64; 2]; 2] {
        let h = 1e-5 * x.abs().max(1.0);
        let (p, m) = (self.matrix(x + h), self.matrix(x - h));
        let d = |i: usize, j: usize| (p[i][j] - m[i][j]) / (2.0 * h);
        [[d(0, 0), d(0, 1)], [d(1, 0), d(1, 1)]]
    }
}

impl Diabatic1D for Tully {
    fn mass(&self) -> f64 {
        self.mass
    }
    fn matrix(&self, x: f64) -> [[f64; 2]; 2] {
        Tully::matrix(self, x)
    }
    fn matrix_derivative(&self, x: f64) -> [[f64; 2]; 2] {
        let (_, [d11, d22, d12]) = self.elements(x);
        [[d11, d12], [d12, d22]]
    }
}

/// Errors of the wavepacket solver.
#[derive(Clone, Debug, Error, PartialEq)]
pub enum WavepacketError {
    /// A setup parameter is invalid; `parameter` names it.
    #[error("invalid wavepacket setup: {parameter}: {reason}")]
    InvalidSetup {
        /// Name of the offending parameter (field name of [`WavepacketSetup`],
        /// or `mass`/`momentum` for the model and Landau–Zener inputs).
        parameter: &'static str,
        /// What is wrong with it.
        reason: String,
    },
    /// The model returned a non-finite matrix element.
    #[error("the diabatic matrix is not finite at x = {x} bohr")]
    NonFinitePotential {
        /// Where.
        x: f64,
    },
}

fn invalid(parameter: &'static str, reason: String) -> WavepacketError {
    WavepacketError::InvalidSetup { parameter, reason }
}

/// Everything that defines one scattering calculation (atomic units).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct WavepacketSetup {
    /// Initial packet centre x₀ (bohr).
    pub x0: f64,
    /// Mean initial momentum k₀ (a.u.); positive moves to +x.
    pub k0: f64,
    /// Position standard deviation σ of |ψ|² (bohr).
    pub sigma: f64,
    /// Initial adiabatic state: 0 = lower, 1 = upper.
    pub state: usize,
    /// Number of grid points (a power of two, at least 16).
    pub points: usize,
    /// Lower edge of the periodic box (bohr).
    pub x_min: f64,
    /// Upper edge of the periodic box (bohr, excluded).
    pub x_max: f64,
    /// Time step (a.u.).
    pub dt: f64,
    /// Maximum propagation time (a.u.).
    pub t_max: f64,
    /// Interaction region [x_l, x_r] (bohr): outside it the model must be
    /// asymptotic (no further transitions).
    pub interaction: [f64; 2],
    /// Width of the absorbing layer at each box edge (bohr); 0 disables
    /// absorption.
    pub absorber_width: f64,
    /// Stop when the norm on the grid, or the density inside the interaction
    /// region after the packet has crossed it, is below this.
    pub tolerance: f64,
}

impl WavepacketSetup {
    /// Converged defaults for Tully's models at initial momentum `k0` (a.u.)
    /// on the lower state: σ = 20/k₀ (common practice for these models),
    /// x₀ = −15 bohr (moved left to x₀ = −10 − 5σ when the packet would
    /// otherwise reach into the interaction region, i.e. for k₀ < 20/3),
    /// interaction region [−10, 10] bohr, box [−64, 64) bohr (extended to the
    /// left for wide packets) with 12-bohr absorbers, Δt = 40/k₀ a.u. clamped
    /// to [0.5, 4], tolerance 10⁻⁶, t_max = ten free flights across the box,
    /// and the smallest power-of-two grid with at least 2048 points and
    /// Δx ≤ 1/16 bohr whose largest momentum π/Δx exceeds 1.25 times the
    /// largest momentum the packet can reach ([`Self::max_momentum`]). See
    /// `tests/wavepacket.rs` for the convergence checks.
    pub fn for_tully(model: &Tully, k0: f64) -> Result<Self, WavepacketError> {
        if !(k0.is_finite() && k0 > 0.0) {
            return Err(invalid(
                "k0",
                format!("must be positive and finite, got {k0}"),
            ));
        }
        let sigma = 20.0 / k0;
        let interaction = [-10.0, 10.0];
        let absorber_width = 12.0;
        let x0 = (-15.0f64).min(interaction[0] - PACKET_HALF_WIDTH * sigma);
        let x_min = (-64.0f64).min((x0 - PACKET_HALF_WIDTH * sigma - absorber_width - 1.0).floor());
        let x_max = 64.0;
        let mut setup = Self {
            x0,
            k0,
            sigma,
            state: 0,
            points: 2048,
            x_min,
            x_max,
            dt: (40.0 / k0).clamp(0.5, 4.0),
            t_max: 10.0 * (x_max - x_min) * model.mass / k0,
            interaction,
            absorber_width,
            tolerance: 1e-6,
        };
        let p_needed = 1.25 * setup.max_momentum(model)?;
        while setup.points < (1 << 22) && (PI / setup.dx() < p_needed || setup.dx() > 0.0625) {
            setup.points *= 2;
        }
        setup.validate(model)?;
        Ok(setup)
    }

    /// Grid spacing (bohr).
    pub fn dx(&self) -> f64 {
        (self.x_max - self.x_min) / self.points as f64
    }

    /// Largest momentum (a.u.) the packet can reach: the top of its initial
    /// momentum distribution (k₀ + 6 standard deviations) plus the energy it
    /// can gain going down to the lowest adiabatic energy on the grid.
    pub fn max_momentum<M: Diabatic1D + ?Sized>(&self, model: &M) -> Result<f64, WavepacketError> {
        let mass = model.mass();
        let p_top = self.k0.abs() + MOMENTUM_MARGIN / (2.0 * self.sigma);
        let e_start = eigen(checked_matrix(model, self.x0)?).0[self.state.min(1)];
        let dx = self.dx();
        let mut e_min = f64::INFINITY;
        for j in 0..self.points {
            let x = self.x_min + j as f64 * dx;
            e_min = e_min.min(eigen(checked_matrix(model, x)?).0[0]);
        }
        let kinetic = p_top * p_top / (2.0 * mass) + (e_start - e_min).max(0.0);
        Ok((2.0 * mass * kinetic).sqrt())
    }

    /// Check every parameter; the error names the first bad one.
    pub fn validate<M: Diabatic1D + ?Sized>(&self, model: &M) -> Result<(), WavepacketError> {
        let mass = model.mass();
        if !(mass.is_finite() && mass > 0.0) {
            return Err(invalid(
                "mass",
                format!("must be positive and finite, got {mass}"),
            ));
        }
        if self.points < 16 || !self.points.is_power_of_two() {
            return Err(invalid(
                "points",
                format!("must be a power of two ≥ 16, got {}", self.points),
            ));
        }
        if !(self.x_min.is_finite() && self.x_max.is_finite() && self.x_min < self.x_max) {
            return Err(invalid(
                "x_min",
                format!(
                    "box [{}, {}) must be finite with x_min < x_max",
                    self.x_min, self.x_max
                ),
            ));
        }
        positive("sigma", self.sigma)?;
        positive("dt", self.dt)?;
        positive("t_max", self.t_max)?;
        positive("tolerance", self.tolerance)?;
        if !self.k0.is_finite() {
            return Err(invalid("k0", format!("must be finite, got {}", self.k0)));
        }
        if self.state > 1 {
            return Err(invalid(
                "state",
                format!("must be 0 (lower) or 1 (upper), got {}", self.state),
            ));
        }
        let w = self.absorber_width;
        let length = self.x_max - self.x_min;
        if !(w.is_finite() && w >= 0.0 && 2.0 * w < length) {
            return Err(invalid(
                "absorber_width",
                format!("must be ≥ 0 and leave room inside the box of length {length}, got {w}"),
            ));
        }
        let (lo, hi) = (self.x_min + w, self.x_max - w);
        let [xl, xr] = self.interaction;
        if !(xl.is_finite() && xr.is_finite() && lo <= xl && xl < xr && xr <= hi) {
            return Err(invalid(
                "interaction",
                format!("region [{xl}, {xr}] must be ordered and inside the absorber-free part [{lo}, {hi}]"),
            ));
        }
        if !(self.x0.is_finite() && self.x_min <= self.x0 && self.x0 < self.x_max) {
            return Err(invalid(
                "x0",
                format!(
                    "{} lies outside the box [{}, {})",
                    self.x0, self.x_min, self.x_max
                ),
            ));
        }
        let half = PACKET_HALF_WIDTH * self.sigma;
        if self.x0 - half < lo || self.x0 + half > hi {
            return Err(invalid(
                "x0",
                format!(
                    "the packet x0 ± 5σ = [{}, {}] must lie inside the absorber-free part [{lo}, {hi}]",
                    self.x0 - half,
                    self.x0 + half
                ),
            ));
        }
        let p_max = PI / self.dx();
        let p_reach = self.max_momentum(model)?;
        if p_reach >= p_max {
            return Err(invalid(
                "points",
                format!(
                    "grid too coarse: the packet reaches |p| = {p_reach:.3} a.u. but the grid \
                     resolves |p| < π/dx = {p_max:.3} a.u.; use more points or a smaller box"
                ),
            ));
        }
        Ok(())
    }
}

fn positive(parameter: &'static str, value: f64) -> Result<(), WavepacketError> {
    if value.is_finite() && value > 0.0 {
        Ok(())
    } else {
        Err(invalid(
            parameter,
            format!("must be positive and finite, got {value}"),
        ))
    }
}

fn checked_matrix<M: Diabatic1D + ?Sized>(
    model: &M,
    x: f64,
) -> Result<[[f64; 2]; 2], WavepacketError> {
    let w = model.matrix(x);
    if w.iter().flatten().all(|v| v.is_finite()) {
        Ok(w)
    } else {
        Err(WavepacketError::NonFinitePotential { x })
    }
}

/// Eigenvalues (ascending) and eigenvectors [lower, upper] of the symmetric
/// 2×2 matrix built from `w[0][0]`, `w[1][1]` and `w[0][1]`.
fn eigen(w: [[f64; 2]; 2]) -> ([f64; 2], [[f64; 2]; 2]) {
    let (a, b, c) = (w[0][0], w[1][1], w[0][1]);
    let mean = 0.5 * (a + b);
    let half = 0.5 * (a - b);
    let r = half.hypot(c);
    // tan 2θ = 2c/(a − b): (cos θ, sin θ) belongs to mean + r.
    let (s, co) = (0.5 * c.atan2(half)).sin_cos();
    ([mean - r, mean + r], [[-s, co], [co, s]])
}

/// Exact e^{−iWτ} of the real symmetric 2×2 matrix as (U₁₁, U₂₂, U₁₂).
fn potential_propagator(w: [[f64; 2]; 2], tau: f64) -> [Complex64; 3] {
    let (a, b, c) = (w[0][0], w[1][1], w[0][1]);
    let mean = 0.5 * (a + b);
    let d = 0.5 * (a - b);
    let delta = d.hypot(c);
    let phase = Complex64::from_polar(1.0, -mean * tau);
    let cos = (delta * tau).cos();
    // sin(Δτ)/Δ, with its limit τ at Δ → 0.
    let sinc = if delta * tau > 1e-8 {
        (delta * tau).sin() / delta
    } else {
        tau
    };
    [
        phase * Complex64::new(cos, -sinc * d),
        phase * Complex64::new(cos, sinc * d),
        phase * Complex64::new(0.0, -sinc * c),
    ]
}

/// Why a propagation stopped.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum StopReason {
    /// The norm left on the grid fell below the tolerance.
    Absorbed,
    /// The interaction region emptied after the packet had crossed it.
    RegionEmpty,
    /// The maximum time was reached.
    MaxTime,
}

/// Branching ratios of one calculation; index 0 = lower, 1 = upper adiabatic
/// state.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ScatteringResult {
    /// Probability to leave on the far side, per adiabatic state.
    pub transmission: [f64; 2],
    /// Probability to leave on the side of x₀, per adiabatic state.
    pub reflection: [f64; 2],
    /// Time reached (a.u.).
    pub time: f64,
    /// Number of steps taken.
    pub steps: usize,
    /// Norm still on the grid at the end (already included in the channels).
    pub norm_on_grid: f64,
    /// Density still inside the interaction region at the end (included in
    /// the channels by the side of the region's centre; small when converged).
    pub unresolved: f64,
    /// Why the propagation stopped.
    pub stop: StopReason,
}

impl ScatteringResult {
    /// Sum of the four channels (1 up to rounding).
    pub fn total(&self) -> f64 {
        self.transmission.iter().chain(&self.reflection).sum()
    }
}

/// A wavepacket on the grid, ready to be propagated step by step.
pub struct Wavepacket {
    setup: WavepacketSetup,
    mass: f64,
    n: usize,
    dx: f64,
    /// Diabatic components: ψ₁ in `psi[..n]`, ψ₂ in `psi[n..]`.
    psi: Vec<Complex64>,
    /// Half-step potential propagators (U₁₁, U₂₂, U₁₂) per grid point.
    potential: Vec<[Complex64; 3]>,
    /// Kinetic factor e^{−ip²Δt/2m}/N per FFT index (includes the inverse
    /// transform's normalisation).
    kinetic: Vec<Complex64>,
    /// Sign-continuous adiabatic eigenvectors [lower, upper] per grid point.
    vectors: Vec<[[f64; 2]; 2]>,
    /// Absorbing mask values on the grid points of the layers: (index, M).
    mask: Vec<(usize, f64)>,
    /// Grid points left of the interaction-region centre are side 0.
    split: usize,
    /// Side index (0 = left, 1 = right) that counts as reflected.
    reflected_side: usize,
    /// Interaction region as an index range.
    region: std::ops::Range<usize>,
    /// Absorbed density per [side][adiabatic state].
    absorbed: [[f64; 2]; 2],
    forward: Arc<dyn Fft<f64>>,
    inverse: Arc<dyn Fft<f64>>,
    scratch: Vec<Complex64>,
    time: f64,
    steps: usize,
}

impl fmt::Debug for Wavepacket {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("Wavepacket")
            .field("setup", &self.setup)
            .field("time", &self.time)
            .field("steps", &self.steps)
            .field("absorbed", &self.absorbed)
            .finish_non_exhaustive()
    }
}

impl Wavepacket {
    /// Validate the setup, tabulate the propagators and build ψ(x, 0).
    pub fn new<M: Diabatic1D + ?Sized>(
        model: &M,
        setup: &WavepacketSetup,
    ) -> Result<Self, WavepacketError> {
        setup.validate(model)?;
        let n = setup.points;
        let dx = setup.dx();
        let x = |j: usize| setup.x_min + j as f64 * dx;

        let mut potential = Vec::with_capacity(n);
        let mut vectors: Vec<[[f64; 2]; 2]> = Vec::with_capacity(n);
        for j in 0..n {
            let w = checked_matrix(model, x(j))?;
            potential.push(potential_propagator(w, 0.5 * setup.dt));
            let (_, mut u) = eigen(w);
            if let Some(prev) = vectors.last() {
                for (ui, pi) in u.iter_mut().zip(prev) {
                    if ui[0] * pi[0] + ui[1] * pi[1] < 0.0 {
                        *ui = [-ui[0], -ui[1]];
                    }
                }
            }
            vectors.push(u);
        }

        let mass = model.mass();
        let dp = 2.0 * PI / (n as f64 * dx);
        let kinetic = (0..n)
            .map(|j| {
                let p = if j < n / 2 {
                    j as f64
                } else {
                    j as f64 - n as f64
                } * dp;
                Complex64::from_polar(1.0 / n as f64, -p * p * setup.dt / (2.0 * mass))
            })
            .collect();

        let mask = absorbing_mask(setup, dx);
        let index = |x: f64| (((x - setup.x_min) / dx).ceil().max(0.0) as usize).min(n);
        let [xl, xr] = setup.interaction;
        let centre = 0.5 * (xl + xr);
        let split = index(centre);
        let reflected_side = usize::from(setup.x0 >= centre);

        let mut planner = FftPlanner::new();
        let forward = planner.plan_fft_forward(n);
        let inverse = planner.plan_fft_inverse(n);
        let scratch_len = forward
            .get_inplace_scratch_len()
            .max(inverse.get_inplace_scratch_len());

        let mut packet = Self {
            setup: setup.clone(),
            mass,
            n,
            dx,
            psi: vec![Complex64::new(0.0, 0.0); 2 * n],
            potential,
            kinetic,
            vectors,
            mask,
            split,
            reflected_side,
            region: index(xl)..index(xr),
            absorbed: [[0.0; 2]; 2],
            forward,
            inverse,
            scratch: vec![Complex64::new(0.0, 0.0); scratch_len],
            time: 0.0,
            steps: 0,
        };
        packet.initialise();
        Ok(packet)
    }

    /// ψ(x, 0) = φ(x) u_s(x), normalised on the grid.
    fn initialise(&mut self) {
        let s = &self.setup;
        let (n, dx) = (self.n, self.dx);
        for j in 0..n {
            let x = s.x_min + j as f64 * dx;
            let y = x - s.x0;
            let phi = Complex64::from_polar((-y * y / (4.0 * s.sigma * s.sigma)).exp(), s.k0 * x);
            let u = self.vectors[j][s.state];
            self.psi[j] = phi * u[0];
            self.psi[n + j] = phi * u[1];
        }
        let scale = 1.0 / self.norm().sqrt();
        self.psi.iter_mut().for_each(|v| *v *= scale);
    }

    /// The setup this packet was built from.
    pub fn setup(&self) -> &WavepacketSetup {
        &self.setup
    }

    /// Time reached (a.u.).
    pub fn time(&self) -> f64 {
        self.time
    }

    /// Steps taken.
    pub fn steps(&self) -> usize {
        self.steps
    }

    /// Grid positions (bohr).
    pub fn positions(&self) -> Vec<f64> {
        (0..self.n)
            .map(|j| self.setup.x_min + j as f64 * self.dx)
            .collect()
    }

    /// Diabatic components (ψ₁, ψ₂) on the grid.
    pub fn components(&self) -> (&[Complex64], &[Complex64]) {
        self.psi.split_at(self.n)
    }

    /// Norm Σ|ψ|²Δx on the grid.
    pub fn norm(&self) -> f64 {
        self.psi.iter().map(|v| v.norm_sqr()).sum::<f64>() * self.dx
    }

    /// Adiabatic densities |u_iᵀψ|²Δx at grid point j.
    fn adiabatic_density(&self, j: usize) -> [f64; 2] {
        let (a, b) = (self.psi[j], self.psi[self.n + j]);
        self.vectors[j].map(|u| (a * u[0] + b * u[1]).norm_sqr() * self.dx)
    }

    /// Adiabatic populations [lower, upper] currently on the grid.
    pub fn adiabatic_populations(&self) -> [f64; 2] {
        (0..self.n).fold([0.0; 2], |acc, j| {
            let d = self.adiabatic_density(j);
            [acc[0] + d[0], acc[1] + d[1]]
        })
    }

    /// Density inside the interaction region.
    pub fn region_density(&self) -> f64 {
        let n = self.n;
        self.region
            .clone()
            .map(|j| self.psi[j].norm_sqr() + self.psi[n + j].norm_sqr())
            .sum::<f64>()
            * self.dx
    }

    /// One Strang step, then absorption (if the setup has absorbers).
    pub fn step(&mut self) {
        self.apply_potential();
        self.forward
            .process_with_scratch(&mut self.psi, &mut self.scratch);
        for half in self.psi.chunks_exact_mut(self.n) {
            half.iter_mut()
                .zip(&self.kinetic)
                .for_each(|(v, k)| *v *= k);
        }
        self.inverse
            .process_with_scratch(&mut self.psi, &mut self.scratch);
        self.apply_potential();
        self.absorb();
        self.steps += 1;
        self.time = self.steps as f64 * self.setup.dt;
    }

    fn apply_potential(&mut self) {
        let (first, second) = self.psi.split_at_mut(self.n);
        for ((a, b), u) in first.iter_mut().zip(second.iter_mut()).zip(&self.potential) {
            let (pa, pb) = (*a, *b);
            *a = u[0] * pa + u[2] * pb;
            *b = u[2] * pa + u[1] * pb;
        }
    }

    /// Multiply by the mask, after booking the removed density per side and
    /// adiabatic state.
    fn absorb(&mut self) {
        for k in 0..self.mask.len() {
            let (j, m) = self.mask[k];
            let removed = 1.0 - m * m;
            let density = self.adiabatic_density(j);
            let side = usize::from(j >= self.split);
            for (acc, d) in self.absorbed[side].iter_mut().zip(density) {
                *acc += removed * d;
            }
            self.psi[j] *= m;
            self.psi[self.n + j] *= m;
        }
    }

    /// Channels [side][state]: absorbed so far plus what is on the grid.
    fn side_channels(&self) -> [[f64; 2]; 2] {
        let mut channels = self.absorbed;
        for j in 0..self.n {
            let side = usize::from(j >= self.split);
            let d = self.adiabatic_density(j);
            channels[side][0] += d[0];
            channels[side][1] += d[1];
        }
        channels
    }

    /// Current branching ratios (absorbed plus classified grid density).
    pub fn result(&self, stop: StopReason) -> ScatteringResult {
        let channels = self.side_channels();
        ScatteringResult {
            transmission: channels[1 - self.reflected_side],
            reflection: channels[self.reflected_side],
            time: self.time,
            steps: self.steps,
            norm_on_grid: self.norm(),
            unresolved: self.region_density(),
            stop,
        }
    }

    /// Free-flight time for the packet centre to cross the whole interaction
    /// region; the region-empty criterion is not used before it.
    fn crossing_time(&self) -> f64 {
        let s = &self.setup;
        let [xl, xr] = s.interaction;
        let distance = if s.k0 >= 0.0 { xr - s.x0 } else { s.x0 - xl };
        if s.k0 == 0.0 {
            0.0
        } else {
            distance.max(0.0) * self.mass / s.k0.abs()
        }
    }

    /// Propagate until a stopping criterion is met (module docs).
    pub fn run(mut self) -> ScatteringResult {
        let t_cross = self.crossing_time();
        let max_steps = (self.setup.t_max / self.setup.dt).ceil() as usize;
        let tol = self.setup.tolerance;
        loop {
            if self.steps % CHECK_EVERY == 0 {
                if self.norm() < tol {
                    return self.result(StopReason::Absorbed);
                }
                if self.time >= t_cross && self.region_density() < tol {
                    return self.result(StopReason::RegionEmpty);
                }
            }
            if self.steps >= max_steps {
                return self.result(StopReason::MaxTime);
            }
            self.step();
        }
    }
}

/// Mask values (index, M) on the grid points inside the absorbing layers.
fn absorbing_mask(setup: &WavepacketSetup, dx: f64) -> Vec<(usize, f64)> {
    let w = setup.absorber_width;
    if w <= 0.0 {
        return Vec::new();
    }
    let exponent = setup.dt / MASK_TIME;
    (0..setup.points)
        .filter_map(|j| {
            let x = setup.x_min + j as f64 * dx;
            let depth = (setup.x_min + w - x).max(x - (setup.x_max - w)) / w;
            (depth > 0.0).then(|| (j, (0.5 * PI * depth.min(1.0)).cos().max(0.0).powf(exponent)))
        })
        .collect()
}

/// Validate, build and propagate: the branching ratios of `model` for `setup`.
pub fn scatter<M: Diabatic1D + ?Sized>(
    model: &M,
    setup: &WavepacketSetup,
) -> Result<ScatteringResult, WavepacketError> {
    Ok(Wavepacket::new(model, setup)?.run())
}

/// Landau–Zener probability of diabatic passage through the crossing at
/// `crossing` (bohr) for momentum `momentum` (a.u.):
/// P = exp(−2π W₁₂² / (v |d(W₁₁ − W₂₂)/dx|)), v = momentum/mass. Starting on
/// the lower adiabatic state, it is the probability to end on the upper one.
pub fn landau_zener<M: Diabatic1D + ?Sized>(
    model: &M,
    crossing: f64,
    momentum: f64,
) -> Result<f64, WavepacketError> {
    let mass = model.mass();
    if !(mass.is_finite() && mass > 0.0) {
        return Err(invalid(
            "mass",
            format!("must be positive and finite, got {mass}"),
        ));
    }
    positive("momentum", momentum)?;
    let w = checked_matrix(model, crossing)?;
    let dw = model.matrix_derivative(crossing);
    let slope = (dw[0][0] - dw[1][1]).abs();
    if !(slope.is_finite() && slope > 0.0) {
        return Err(invalid(
            "crossing",
            format!("d(W11 − W22)/dx must be non-zero and finite at x = {crossing}, got {slope}"),
        ));
    }
    let v = momentum / mass;
    Ok((-2.0 * PI * w[0][1] * w[0][1] / (v * slope)).exp())
}
