//! `flipswarm export`: chosen trajectories as CSV tables, or as extended-XYZ
//! frames for molecular viewers when the coordinates are Cartesian.

use std::io::Write;
use std::path::PathBuf;

use clap::{Args, ValueEnum};

use super::exit;
use crate::chem::xyz::{write_extxyz_frame, FrameProperties};
use crate::chem::{Element, Molecule};
use crate::ensemble::h5::{PartReader, TrajectoryData};
use crate::units;

/// Output formats.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum Format {
    /// One row per recorded step: time (fs), step, active state, energies (eV), |c|², coordinates.
    Csv,
    /// Extended XYZ, one frame per recorded step (needs --elements).
    Xyz,
}

/// Arguments of `flipswarm export`.
#[derive(Debug, Args)]
pub struct ExportArgs {
    /// A part file, a merged file or a run directory.
    pub path: PathBuf,
    /// Trajectory index to export (repeatable).
    #[arg(long = "trajectory", short = 't', required = true)]
    pub trajectories: Vec<usize>,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Csv)]
    pub format: Format,
    /// Element of each atom, comma-separated (for xyz; coordinates are read
    /// as x, y, z per atom in bohr), e.g. --elements C,C,H,H,H,H.
    #[arg(long, value_delimiter = ',')]
    pub elements: Vec<String>,
    /// Output file (must not exist).
    #[arg(short, long)]
    pub output: PathBuf,
}

/// Execute; returns the exit code.
pub fn execute(args: &ExportArgs) -> i32 {
    match export(args) {
        Ok(n) => {
            println!("{}: {n} frames", args.output.display());
            exit::OK
        }
        Err(e) => {
            eprintln!("error: {e}");
            exit::INPUT
        }
    }
}

fn export(args: &ExportArgs) -> Result<usize, String> {
    if args.output.exists() {
        return Err(format!(
            "{} exists; choose another name or remove it first",
            args.output.display()
        ));
    }
    let mut found: Vec<TrajectoryData> = Vec::new();
    for file in super::inspect::part_files(&args.path)? {
        let r = PartReader::open(&file).map_err(|e| e.to_string())?;
        for &i in &args.trajectories {
            if r.trajectory_indices().contains(&i) {
                found.push(r.read(i).map_err(|e| e.to_string())?);
            }
        }
    }
    for &i in &args.trajectories {
        if !found.iter().any(|d| d.header.index == i) {
            return Err(format!("{}: no trajectory {i}", args.path.display()));
        }
    }
    let mut elements: Vec<Element> = args
        .elements
        .iter()
        .map(|s| {
            Element::parse_symbol_or_number(s.trim()).map_err(|e| format!("--elements: `{s}`: {e}"))
        })
        .collect::<Result<_, _>>()?;
    if elements.is_empty() {
        elements = molecule_elements(&args.path).unwrap_or_default();
    }
    let n_dof = found[0].header.q0.len();
    if args.format == Format::Xyz {
        if elements.is_empty() {
            return Err("--format xyz needs --elements (one per atom; the coordinates are x, y, z per atom); molecular runs supply them from their run.toml".into());
        }
        if elements.len() * 3 != n_dof {
            return Err(format!("--elements names {} atoms, but the trajectories have {n_dof} coordinates ({} would need {} atoms)", elements.len(), n_dof, if n_dof % 3 == 0 { (n_dof / 3).to_string() } else { "no whole number of".into() }));
        }
    }
    let mut text = Vec::new();
    let mut frames = 0;
    for data in &found {
        match args.format {
            Format::Csv => frames += write_csv(&mut text, data, frames == 0),
            Format::Xyz => frames += write_xyz(&mut text, data, &elements)?,
        }
    }
    let mut f = std::fs::OpenOptions::new()
        .write(true)
        .create_new(true)
        .open(&args.output)
        .map_err(|e| format!("{}: {e}", args.output.display()))?;
    f.write_all(&text)
        .map_err(|e| format!("{}: {e}", args.output.display()))?;
    Ok(frames)
}

fn write_csv(out: &mut Vec<u8>, data: &TrajectoryData, header: bool) -> usize {
    let n_states = data.rows.first().map_or(0, |r| r.energies.len());
    let n_dof = data.header.q0.len();
    if header {
        let mut h =
            String::from("trajectory,time_fs,step,active_state,kinetic_ev,potential_ev,total_ev");
        (0..n_states).for_each(|k| h.push_str(&format!(",energy_{k}_ev")));
        (0..n_states).for_each(|k| h.push_str(&format!(",population_{k}")));
        (0..n_dof).for_each(|k| h.push_str(&format!(",q_{k}")));
        let _ = writeln!(out, "{h}");
    }
    for r in &data.rows {
        let ev = units::hartree_to_ev;
        let mut line = format!(
            "{},{},{},{},{},{},{}",
            data.header.index,
            units::au_to_fs(r.time),
            r.step,
            r.active,
            ev(r.kinetic),
            ev(r.potential),
            ev(r.total)
        );
        r.energies
            .iter()
            .for_each(|e| line.push_str(&format!(",{}", ev(*e))));
        r.amplitudes
            .iter()
            .for_each(|c| line.push_str(&format!(",{}", c.norm_sqr())));
        r.q.iter().for_each(|q| line.push_str(&format!(",{q}")));
        let _ = writeln!(out, "{line}");
    }
    data.rows.len()
}

/// The elements of a molecular run, from the run directory's `run.toml`.
fn molecule_elements(path: &std::path::Path) -> Option<Vec<Element>> {
    let toml = path.join("run.toml");
    match crate::config::load_file(&toml, &[]).ok()?.model {
        crate::config::ModelSpec::Molecule { spec, .. } => {
            Some(spec.calculation.molecule.elements())
        }
        _ => None,
    }
}

fn write_xyz(
    out: &mut Vec<u8>,
    data: &TrajectoryData,
    elements: &[Element],
) -> Result<usize, String> {
    for r in &data.rows {
        let positions: Vec<[f64; 3]> = r.q.chunks_exact(3).map(|c| [c[0], c[1], c[2]]).collect();
        let mol = Molecule::from_elements_positions_bohr(elements, &positions)
            .map_err(|e| e.to_string())?;
        let props = FrameProperties::new()
            .int("trajectory", data.header.index as i64)
            .int("step", r.step as i64)
            .float("time_fs", units::au_to_fs(r.time))
            .int("active_state", r.active as i64)
            .float("potential_ev", units::hartree_to_ev(r.potential))
            .float("total_ev", units::hartree_to_ev(r.total));
        write_extxyz_frame(out, &mol, &props).map_err(|e| e.to_string())?;
    }
    Ok(data.rows.len())
}
