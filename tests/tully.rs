//! FSSH on Tully's three models (J. Chem. Phys. 93, 1061 (1990)) against the
//! exact quantum branching ratios from the project's independent
//! split-operator solver (`flipswarm::dynamics::wavepacket`, itself checked in
//! `tests/wavepacket.rs`). FSSH starts from the Wigner distribution of the
//! same Gaussian wavepacket (σ = 20/k, common practice), so both methods solve
//! the same problem.

use std::path::Path;

use flipswarm::config::{load_str, RunConfig};
use flipswarm::dynamics::wavepacket::{scatter, ScatteringResult, WavepacketSetup};
use flipswarm::electronic::models::{Tully, TullyModel};
use flipswarm::swarm::{self, Channel, Summary};

const TRAJECTORIES: usize = 2000;

fn kind(model: TullyModel) -> &'static str {
    match model {
        TullyModel::SimpleAvoidedCrossing => "tully-1",
        TullyModel::DualAvoidedCrossing => "tully-2",
        TullyModel::ExtendedCoupling => "tully-3",
    }
}

/// The exact result and the FSSH ensemble for one model, momentum and
/// decoherence scheme.
fn both(model: TullyModel, k: f64, decoherence: &str) -> (ScatteringResult, Summary) {
    let tully = Tully::new(model);
    let setup = WavepacketSetup::for_tully(&tully, k).unwrap();
    let exact = scatter(&tully, &setup).unwrap();
    let x0 = setup.x0;
    let text = format!(
        r#"[model]
kind = "{}"
[start]
sampling = "wigner"
position_bohr = {x0}
momentum_au = {k}
width_bohr = {}
state = 0
[dynamics]
timestep_au = 1.0
duration_au = {}
substeps = 20
decoherence = "{decoherence}"
exit_region_bohr = [{}, {}]
[swarm]
trajectories = {TRAJECTORIES}
seed = 1990
"#,
        kind(model),
        setup.sigma,
        (8.0 * x0.abs() * tully.mass / k).ceil(),
        x0 - 0.5,
        -x0 + 0.5,
    );
    let cfg: RunConfig = load_str(&text, "tully-test", Path::new("."), &[]).unwrap();
    let outcomes = swarm::run(&cfg, 1).unwrap();
    let summary = Summary::new(&cfg, &outcomes);
    assert!(
        summary.failed.is_empty(),
        "failed trajectories: {:?}",
        &summary.failed[..summary.failed.len().min(3)]
    );
    (exact, summary)
}

fn p(s: &Summary, c: Channel, state: usize) -> (f64, f64) {
    s.channel(c, state)
        .map_or((0.0, 0.0), |e| (e.probability, e.standard_error))
}

/// |FSSH − exact| within 3 standard errors + 0.03 for each channel.
fn assert_agree(label: &str, exact: &ScatteringResult, s: &Summary) {
    let pairs = [
        ("T0", p(s, Channel::Transmitted, 0), exact.transmission[0]),
        ("T1", p(s, Channel::Transmitted, 1), exact.transmission[1]),
        ("R0", p(s, Channel::Reflected, 0), exact.reflection[0]),
        ("R1", p(s, Channel::Reflected, 1), exact.reflection[1]),
    ];
    for (name, (fssh, se), ex) in pairs {
        eprintln!("{label} {name}: FSSH {fssh:.4} ± {se:.4}, exact {ex:.4}");
        assert!(
            (fssh - ex).abs() <= 3.0 * se + 0.03,
            "{label} {name}: FSSH {fssh:.4} ± {se:.4} vs exact {ex:.4}"
        );
    }
}

/// Internal consistency of FSSH without frustrated hops (the property the
/// algorithm is built to satisfy, J. Chem. Phys. 93, 1061 (1990)): the
/// fraction of trajectories on each state equals the mean |c|².
fn assert_consistent(label: &str, s: &Summary) {
    for (state, ((frac, _), pop)) in s
        .state_fractions
        .iter()
        .zip(&s.mean_populations)
        .enumerate()
    {
        eprintln!("{label} state {state}: fraction {frac:.4}, mean |c|² {pop:.4}");
        assert!(
            (frac - pop).abs() < 0.03,
            "{label} state {state}: fraction {frac:.4} vs mean |c|² {pop:.4}"
        );
    }
}

/// Model 1, k = 10–30: FSSH reproduces the exact transmission on both
/// states (J. Chem. Phys. 93, 1061 (1990), Fig. 3); at k ≥ 15 fractions and
/// mean |c|² agree.
#[test]
fn model_1_matches_exact_and_is_internally_consistent() {
    for k in [10.0, 15.0, 20.0, 25.0, 30.0] {
        let (exact, s) = both(TullyModel::SimpleAvoidedCrossing, k, "none");
        let label = format!("model 1, k = {k}");
        assert_agree(&label, &exact, &s);
        if k >= 15.0 {
            assert_eq!(s.hops_frustrated, 0, "{label}: frustrated hops");
            assert_consistent(&label, &s);
        }
    }
}

/// Model 2, k = 20, 30, 40 (J. Chem. Phys. 93, 1061 (1990), Fig. 4).
#[test]
fn model_2_matches_exact() {
    for k in [20.0, 30.0, 40.0] {
        let (exact, s) = both(TullyModel::DualAvoidedCrossing, k, "none");
        assert_agree(&format!("model 2, k = {k}"), &exact, &s);
    }
}

/// Model 3 without decoherence: the over-coherence failure of FSSH in the
/// reflection channels at low momentum (J. Chem. Phys. 93, 1061 (1990),
/// Fig. 5; the failure is why decoherence corrections exist). Measured here:
/// at k = 10 both reflection channels are off by about 0.09 (≈ 10 standard
/// errors); coherent FSSH's reflection oscillates with k around the exact
/// curve (off by 0.04 at k = 15, by chance close at k = 20), so the test
/// asserts the failure at k = 10 and a summed error over k = 10, 15, 20 far
/// above that of the decoherence-corrected runs (0.09 measured).
#[test]
fn model_3_without_decoherence_gets_reflection_wrong() {
    let mut total = 0.0;
    for k in [10.0, 15.0, 20.0] {
        let (exact, s) = both(TullyModel::ExtendedCoupling, k, "none");
        let (r0, se0) = p(&s, Channel::Reflected, 0);
        let (r1, se1) = p(&s, Channel::Reflected, 1);
        let (e0, e1) = (
            (r0 - exact.reflection[0]).abs(),
            (r1 - exact.reflection[1]).abs(),
        );
        eprintln!("model 3 coherent, k = {k}: R0 {r0:.4} ± {se0:.4} (exact {:.4}), R1 {r1:.4} ± {se1:.4} (exact {:.4})", exact.reflection[0], exact.reflection[1]);
        if k == 10.0 {
            assert!(e0 > 0.07 && e0 > 6.0 * se0, "k = 10: R0 error only {e0:.3}");
            assert!(e1 > 0.07 && e1 > 6.0 * se1, "k = 10: R1 error only {e1:.3}");
        }
        total += e0 + e1;
    }
    assert!(
        total > 0.2,
        "summed reflection error of coherent FSSH only {total:.3}"
    );
}

/// Model 3 with the energy-based decoherence correction (J. Chem. Phys. 126,
/// 134114 (2007), C = 0.1 hartree): reflection on both states within 0.05 of
/// the exact result.
#[test]
fn model_3_with_energy_based_decoherence_gets_reflection_right() {
    for k in [10.0, 15.0, 20.0] {
        let (exact, s) = both(TullyModel::ExtendedCoupling, k, "energy-based");
        let (r0, _) = p(&s, Channel::Reflected, 0);
        let (r1, _) = p(&s, Channel::Reflected, 1);
        eprintln!(
            "model 3 decoherent, k = {k}: R0 {r0:.4} (exact {:.4}), R1 {r1:.4} (exact {:.4})",
            exact.reflection[0], exact.reflection[1]
        );
        assert!(
            (r0 - exact.reflection[0]).abs() < 0.05,
            "k = {k}: R0 {r0:.4} vs {:.4}",
            exact.reflection[0]
        );
        assert!(
            (r1 - exact.reflection[1]).abs() < 0.05,
            "k = {k}: R1 {r1:.4} vs {:.4}",
            exact.reflection[1]
        );
    }
}
