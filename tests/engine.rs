//! The engine's numerical kernels against analytic results.

use flipswarm::dynamics::amplitudes::StepCoupling;
use flipswarm::dynamics::{
    DecoherenceScheme, Flow, FrustratedHops, HopDirection, Observer, RecordKind, Settings,
    StepRecord, Trajectory,
};
use flipswarm::electronic::models::{DiabaticBackend, Harmonic, Morse};
use nalgebra::DMatrix;
use num_complex::Complex64;
use rand::SeedableRng;
use rand_chacha::ChaCha20Rng;

fn settings(dt: f64, max_time: f64) -> Settings {
    Settings {
        dt,
        substeps: 1,
        max_time,
        hop_direction: HopDirection::Coupling,
        frustrated: FrustratedHops::Keep,
        decoherence: DecoherenceScheme::None,
        energy_drift_limit: 1.0,
        min_overlap_determinant: 0.3,
        exit_region: None,
    }
}

/// Records position and total energy at every step.
struct Track {
    q: Vec<f64>,
    e: Vec<f64>,
}
impl Observer for Track {
    fn observe(&mut self, r: &StepRecord) -> Result<Flow, String> {
        if r.kind != RecordKind::End {
            self.q.push(r.state.q[0]);
            self.e.push(r.state.kinetic(r.masses) + r.state.potential());
        }
        Ok(Flow::Continue)
    }
}

fn run_oscillator(dt: f64, max_time: f64) -> Track {
    let model = Harmonic {
        masses: vec![1.0],
        omegas: vec![1.0],
        centres: vec![0.0],
    };
    let mut backend = DiabaticBackend::new(model);
    let mut t = Trajectory::start(
        &mut backend,
        settings(dt, max_time),
        vec![1.0],
        vec![0.0],
        0,
        ChaCha20Rng::seed_from_u64(1),
    )
    .unwrap();
    let mut track = Track {
        q: vec![],
        e: vec![],
    };
    t.run(&mut track).unwrap();
    track
}

/// Velocity Verlet is second order: the position error at a fixed time falls
/// by 4 when the step is halved (textbook property of the Störmer–Verlet
/// method: Hairer, Lubich & Wanner, Geometric Numerical Integration, 2006, ch. I.1).
#[test]
fn verlet_is_second_order_on_the_harmonic_oscillator() {
    let t_end = 10.0;
    let mut errors = Vec::new();
    for dt in [0.1, 0.05, 0.025] {
        let track = run_oscillator(dt, t_end);
        let steps = (t_end / dt).round() as usize;
        let exact = t_end.cos(); // q(t) = cos ωt for q(0) = 1, v(0) = 0
        errors.push((track.q[steps] - exact).abs());
    }
    for w in errors.windows(2) {
        let ratio = w[0] / w[1];
        assert!(
            (ratio - 4.0).abs() < 0.1,
            "error ratio {ratio} (errors {errors:?})"
        );
    }
}

/// A symplectic integrator has a bounded energy error with no drift over
/// long times (same reference): over 10⁴ periods the error stays below
/// (ωΔt)²·E and is no larger at the end than at the start.
#[test]
fn verlet_energy_error_is_bounded_over_ten_thousand_periods() {
    let period = 2.0 * std::f64::consts::PI;
    let dt = period / 50.0;
    let track = run_oscillator(dt, 1e4 * period);
    let e0 = 0.5;
    let err: Vec<f64> = track.e.iter().map(|e| (e - e0).abs()).collect();
    let n = err.len();
    assert!(n > 490_000);
    let max_all = err.iter().cloned().fold(0.0, f64::max);
    assert!(max_all < dt * dt * e0, "max energy error {max_all}");
    let first = err[..n / 10].iter().cloned().fold(0.0, f64::max);
    let last = err[n - n / 10..].iter().cloned().fold(0.0, f64::max);
    assert!(
        last < 1.05 * first,
        "energy error grows: first {first}, last {last}"
    );
}

/// Morse oscillator: energy is conserved to O(Δt²) as well (anharmonic case,
/// common practice), and halving the step quarters the worst error.
#[test]
fn verlet_energy_on_a_morse_oscillator_scales_with_dt_squared() {
    let worst = |dt: f64| {
        let model = Morse {
            mass: 1836.0,
            depth: 0.17,
            alpha: 1.0,
            r_eq: 1.4,
        };
        let mut backend = DiabaticBackend::new(model);
        let mut t = Trajectory::start(
            &mut backend,
            settings(dt, 3000.0),
            vec![1.9],
            vec![0.0],
            0,
            ChaCha20Rng::seed_from_u64(1),
        )
        .unwrap();
        let mut track = Track {
            q: vec![],
            e: vec![],
        };
        t.run(&mut track).unwrap();
        let e0 = track.e[0];
        track.e.iter().map(|e| (e - e0).abs()).fold(0.0, f64::max)
    };
    let (a, b) = (worst(2.0), worst(1.0));
    assert!((a / b - 4.0).abs() < 0.4, "ratio {}", a / b);
}

/// Two levels with constant coupling: the population of the second level
/// follows the Rabi formula P₂(t) = 4V²/(Δ² + 4V²) · sin²(Ωt/2), Ω = √(Δ² + 4V²)
/// (textbook two-level result, e.g. Cohen-Tannoudji, Diu & Laloë, Quantum
/// Mechanics, ch. IV). Here the coupling enters as a constant time-derivative
/// coupling T₂₁ = τ, so |H₁₂| = τ, and the states rotate by θ = τΔt per step.
#[test]
fn amplitudes_follow_the_rabi_formula() {
    let (delta, tau, dt) = (0.01, 0.004, 1.0);
    let theta: f64 = tau * dt;
    let s = DMatrix::from_row_slice(2, 2, &[theta.cos(), -theta.sin(), theta.sin(), theta.cos()]);
    let substeps = 50;
    let mut phases = vec![1.0, 1.0];
    let sc = StepCoupling::from_overlaps(&s, &mut phases, dt, substeps).unwrap();
    let e = [0.0, delta];
    let mut c = vec![Complex64::new(1.0, 0.0), Complex64::new(0.0, 0.0)];
    let omega = (delta * delta + 4.0 * tau * tau).sqrt();
    let amp = 4.0 * tau * tau / (omega * omega);
    let mut worst: f64 = 0.0;
    for step in 1..=3000 {
        sc.propagate(&mut c, &e, &e, dt, substeps, 0);
        let t = step as f64 * dt;
        let exact = amp * (0.5 * omega * t).sin().powi(2);
        worst = worst.max((c[1].norm_sqr() - exact).abs());
    }
    assert!(
        worst < 1e-8,
        "largest deviation from the Rabi formula {worst:e}"
    );
}

/// The propagator is unitary: the norm stays 1 to 1e-10 over 10⁵ steps
/// (property of the splitting; common practice), with energies that change
/// within every step.
#[test]
fn amplitude_norm_is_preserved_over_1e5_steps() {
    let theta: f64 = 0.03;
    let s = DMatrix::from_row_slice(2, 2, &[theta.cos(), -theta.sin(), theta.sin(), theta.cos()]);
    let mut phases = vec![1.0, 1.0];
    let sc = StepCoupling::from_overlaps(&s, &mut phases, 0.5, 10).unwrap();
    let mut c = vec![Complex64::new(0.6, 0.0), Complex64::new(0.0, 0.8)];
    for k in 0..100_000 {
        let x = k as f64 * 1e-3;
        sc.propagate(
            &mut c,
            &[x.sin() * 0.1, 0.2],
            &[(x + 1e-3).sin() * 0.1, 0.21],
            0.5,
            10,
            0,
        );
    }
    let norm: f64 = c.iter().map(|z| z.norm_sqr()).sum();
    assert!((norm - 1.0).abs() < 1e-10, "norm {norm}");
}

/// Three states: the general (matrix-logarithm) path conserves the norm and
/// transfers population only through the coupled pair.
#[test]
fn three_state_coupling_moves_population_only_between_coupled_states() {
    let theta: f64 = 0.02;
    // States 1 and 2 rotate into each other; state 0 is uncoupled.
    let s = DMatrix::from_row_slice(
        3,
        3,
        &[
            1.0,
            0.0,
            0.0,
            0.0,
            theta.cos(),
            -theta.sin(),
            0.0,
            theta.sin(),
            theta.cos(),
        ],
    );
    let mut phases = vec![1.0; 3];
    let sc = StepCoupling::from_overlaps(&s, &mut phases, 1.0, 5).unwrap();
    let mut c = vec![
        Complex64::new(0.0, 0.0),
        Complex64::new(1.0, 0.0),
        Complex64::new(0.0, 0.0),
    ];
    let e = [-0.1, 0.0, 0.0];
    for _ in 0..40 {
        sc.propagate(&mut c, &e, &e, 1.0, 5, 1);
    }
    // Degenerate states: exact rotation, P₂ = sin²(40θ).
    assert!(c[0].norm_sqr() < 1e-28);
    assert!((c[2].norm_sqr() - (40.0 * theta).sin().powi(2)).abs() < 1e-12);
}

/// Positions and velocities of one coordinate at every step, and the hops.
struct Spectator {
    k: usize,
    qv: Vec<(f64, f64)>,
    accepted_hops: usize,
}
impl Observer for Spectator {
    fn observe(&mut self, r: &StepRecord) -> Result<Flow, String> {
        if r.kind != RecordKind::End {
            self.qv.push((r.state.q[self.k], r.state.v[self.k]));
            if let Some(h) = r.hop.filter(|h| h.accepted) {
                assert!(
                    (h.kinetic_after - h.kinetic_before + h.gap).abs() < 1e-12,
                    "the hop does not conserve energy: {h:?}"
                );
                self.accepted_hops += 1;
            }
        }
        Ok(Flow::Continue)
    }
}

/// The momentum adjustment at a hop acts along the chosen direction only
/// (FSSH, J. Chem. Phys. 93, 1061 (1990); the gradient-difference choice is
/// common practice). A two-state LVC model of our own with three modes:
/// mode 0 tunes the gap, mode 1 couples the states, mode 2 is a spectator
/// (no state-dependent term), so ∇E₁ − ∇E₀ has no mode-2 component. With
/// gradient-difference adjustment the spectator's path is the same as in a
/// run whose states are uncoupled and far apart (no hop can happen) to 1e-12; with uniform
/// velocity rescaling it is not (the test can tell the two apart). Every
/// accepted hop conserves the total energy to 1e-12 Eh.
#[test]
fn gradient_difference_hops_leave_a_spectator_mode_alone() {
    use flipswarm::electronic::models::Lvc;
    let text = "frequencies_ev = [0.10, 0.15, 0.12]\nvertical_ev = [0.0, 0.25]\n\
        [[gradient]]\nstate = 1\nmode = 0\nvalue_ev = -0.15\n[[coupling]]\nstates = [0, 1]\nmode = 1\nvalue_ev = 0.06\n";
    // No coupling and states 100 eV apart: no hop, not even a trivial crossing.
    let uncoupled = text
        .replace("value_ev = 0.06", "value_ev = 0.0")
        .replace("[0.0, 0.25]", "[0.0, 100.0]");
    let q0 = vec![0.0, 0.0, 9.0];
    let v0 = vec![0.004, 0.002, -0.003];
    let dt = 2.0;
    let run = |model: &str, direction: HopDirection, seed: u64| {
        let mut backend = DiabaticBackend::new(Lvc::from_toml(model, "test").unwrap());
        let mut s = settings(dt, 3000.0);
        s.hop_direction = direction;
        s.substeps = 10;
        let mut t = Trajectory::start(
            &mut backend,
            s,
            q0.clone(),
            v0.clone(),
            1,
            ChaCha20Rng::seed_from_u64(seed),
        )
        .unwrap();
        let mut obs = Spectator {
            k: 2,
            qv: vec![],
            accepted_hops: 0,
        };
        t.run(&mut obs).unwrap();
        obs
    };
    let reference = run(&uncoupled, HopDirection::GradientDifference, 1);
    assert_eq!(reference.accepted_hops, 0);
    let mut tried = 0;
    for seed in 1..6 {
        let gd = run(text, HopDirection::GradientDifference, seed);
        if gd.accepted_hops == 0 {
            continue;
        }
        tried += 1;
        let worst = gd
            .qv
            .iter()
            .zip(&reference.qv)
            .map(|(a, b)| (a.0 - b.0).abs().max((a.1 - b.1).abs()))
            .fold(0.0, f64::max);
        assert!(
            worst < 1e-12,
            "seed {seed}: {} hops moved the spectator by {worst:e}",
            gd.accepted_hops
        );
        let vr = run(text, HopDirection::Velocity, seed);
        if vr.accepted_hops > 0 {
            let moved = vr
                .qv
                .iter()
                .zip(&reference.qv)
                .map(|(a, b)| (a.1 - b.1).abs())
                .fold(0.0, f64::max);
            assert!(
                moved > 1e-8,
                "seed {seed}: velocity rescaling left the spectator alone"
            );
        }
    }
    assert!(tried >= 3, "only {tried} of 5 seeds hopped");
}
