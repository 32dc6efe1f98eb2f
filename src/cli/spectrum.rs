//! `flipswarm spectrum`: the absorption spectrum of an initial-conditions
//! file by the nuclear-ensemble approach (see [`crate::sampling::spectrum`]).

use std::path::PathBuf;

use clap::{Args, ValueEnum};

use super::exit;
use crate::analysis::plot::{self, Chart, Line};
use crate::sampling::files::InitialConditions;
use crate::sampling::spectrum::{spectrum, LineShape};
use crate::units;

/// Line shape.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum Shape {
    /// Gaussian.
    Gaussian,
    /// Lorentzian.
    Lorentzian,
}

/// Arguments of `flipswarm spectrum`.
#[derive(Debug, Args)]
pub struct SpectrumArgs {
    /// Initial-conditions file with excitation data (`flipswarm sample --excite`).
    pub input: PathBuf,
    /// Line shape of every transition.
    #[arg(long, value_enum, default_value = "gaussian")]
    pub shape: Shape,
    /// Half width at half maximum of each line (eV).
    #[arg(long, default_value_t = 0.05)]
    pub width_ev: f64,
    /// Lowest photon energy (eV); default: 1 eV below the lowest transition.
    #[arg(long)]
    pub from_ev: Option<f64>,
    /// Highest photon energy (eV); default: 1 eV above the highest transition.
    #[arg(long)]
    pub to_ev: Option<f64>,
    /// Number of energy points.
    #[arg(long, default_value_t = 1000)]
    pub points: usize,
    /// Output directory (spectrum.csv, spectrum.svg, spectrum.png).
    #[arg(short, long, default_value = "spectrum")]
    pub out: PathBuf,
}

/// Execute; returns the exit code.
pub fn execute(args: &SpectrumArgs) -> i32 {
    if !(args.width_ev > 0.0 && args.width_ev.is_finite()) {
        eprintln!("error: --width-ev must be positive, got {}", args.width_ev);
        return exit::INPUT;
    }
    if args.points < 2 {
        eprintln!("error: --points must be at least 2");
        return exit::INPUT;
    }
    let set = match InitialConditions::read(&args.input) {
        Ok(s) => s,
        Err(e) => {
            eprintln!("error: {e}");
            return exit::INPUT;
        }
    };
    let Some(x) = &set.excitation else {
        eprintln!(
            "error: {}: no excitation data; make it with `flipswarm sample --excite ENSEMBLE.toml`",
            args.input.display()
        );
        return exit::INPUT;
    };
    let ns = x.energies.first().map_or(0, |r| r.len());
    let mut transitions = Vec::new();
    for (e, f) in x.energies.iter().zip(&x.oscillator_strengths) {
        for n in 1..ns {
            transitions.push((n, units::hartree_to_ev(e[n]), f[n]));
        }
    }
    if transitions.is_empty() {
        eprintln!(
            "error: {}: the model has one state only; there is nothing to absorb",
            args.input.display()
        );
        return exit::INPUT;
    }
    let lo = args
        .from_ev
        .unwrap_or_else(|| {
            transitions
                .iter()
                .map(|t| t.1)
                .fold(f64::INFINITY, f64::min)
                - 1.0
        })
        .max(1e-3);
    let hi = args.to_ev.unwrap_or_else(|| {
        transitions
            .iter()
            .map(|t| t.1)
            .fold(f64::NEG_INFINITY, f64::max)
            + 1.0
    });
    if lo.partial_cmp(&hi) != Some(std::cmp::Ordering::Less) {
        eprintln!("error: --from-ev {lo} must be below --to-ev {hi}");
        return exit::INPUT;
    }
    let grid: Vec<f64> = (0..args.points)
        .map(|k| lo + (hi - lo) * k as f64 / (args.points - 1) as f64)
        .collect();
    let shape = match args.shape {
        Shape::Gaussian => LineShape::Gaussian,
        Shape::Lorentzian => LineShape::Lorentzian,
    };
    let sp = spectrum(&transitions, set.len(), ns, shape, args.width_ev, &grid);
    if let Err(e) = std::fs::create_dir_all(&args.out) {
        eprintln!("error: {}: {e}", args.out.display());
        return exit::RUNTIME;
    }
    let csv = args.out.join("spectrum.csv");
    if let Err(e) = std::fs::write(&csv, sp.to_csv()) {
        eprintln!("error: {}: {e}", csv.display());
        return exit::RUNTIME;
    }
    let mut lines = vec![Line {
        label: "total".into(),
        points: grid
            .iter()
            .copied()
            .zip(sp.cross_section_a2.iter().copied())
            .collect(),
        colour: 0,
        dashed: false,
        width: 2,
    }];
    for n in 1..ns {
        lines.push(Line {
            label: format!("S0 -> state {n}"),
            points: grid
                .iter()
                .copied()
                .zip(sp.per_state_a2[n].iter().copied())
                .collect(),
            colour: n,
            dashed: true,
            width: 1,
        });
    }
    let chart = Chart {
        title: format!(
            "absorption, {} geometries, {:?} HWHM {} eV",
            set.len(),
            args.shape,
            args.width_ev
        )
        .to_lowercase(),
        x_label: "photon energy (eV)".into(),
        y_label: "cross section (Å²)".into(),
        lines,
        ..Chart::default()
    };
    if let Err(e) = plot::write(&chart, &args.out.join("spectrum"), (900, 600)) {
        eprintln!("error: {e}");
        return exit::RUNTIME;
    }
    let peak = sp.cross_section_a2.iter().copied().fold(0.0, f64::max);
    let k = sp
        .cross_section_a2
        .iter()
        .position(|&s| s == peak)
        .unwrap_or(0);
    println!(
        "{}: {} geometries, {} transitions; maximum {:.4e} Å² ({:.4e} M^-1 cm^-1) at {:.3} eV",
        args.input.display(),
        set.len(),
        transitions.len(),
        peak,
        sp.molar_absorption()[k],
        grid[k]
    );
    println!(
        "  integral {:.6e} eV·Å² (sum rule: {:.6e} eV·Å² for the mean oscillator strength)",
        sp.integral(),
        crate::sampling::spectrum::cross_section_prefactor_ev_a2()
            * transitions.iter().map(|t| t.2).sum::<f64>()
            / set.len() as f64
    );
    println!(
        "  written: {}, {}, {}",
        csv.display(),
        args.out.join("spectrum.svg").display(),
        args.out.join("spectrum.png").display()
    );
    exit::OK
}
