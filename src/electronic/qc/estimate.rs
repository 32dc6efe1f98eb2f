//! Memory estimates of one SCF + MRSF calculation, made before any work so
//! that a calculation that cannot fit is refused with the numbers instead
//! of failing (or swapping) halfway.
//!
//! Upper bounds, in bytes: the packed two-electron store when it is used
//! (in-core J/K, [`EriStore::bytes_needed`]), the grid (4 doubles per point:
//! position and weight; the unpruned point count), the cached basis-function
//! values on the grid (value and gradient per point and function, capped at
//! [`AO_CACHE_BYTES`]), the Davidson subspace of the response (trial and
//! product vectors of the spin-flip dimension) and ~40 dense nbf × nbf
//! matrices (Fock, densities, orbitals, DIIS history).

use super::dft::grid::GridSpec;
use super::dft::ks::AO_CACHE_BYTES;
use super::integrals::{EriStore, JkOptions};

/// The parts of a [`memory`] estimate (bytes).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct MemoryEstimate {
    /// In-core two-electron integrals (0 when the build is integral-direct).
    pub integrals: usize,
    /// Grid points and weights.
    pub grid: usize,
    /// Basis-function values cached on the grid.
    pub ao_values: usize,
    /// Response trial and product vectors.
    pub response: usize,
    /// Dense nbf × nbf matrices.
    pub matrices: usize,
}

impl MemoryEstimate {
    /// Sum of the parts.
    pub fn total(&self) -> usize {
        self.integrals + self.grid + self.ao_values + self.response + self.matrices
    }
}

impl std::fmt::Display for MemoryEstimate {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "{} (integrals {}, grid {}, basis functions on the grid {}, response vectors {}, matrices {})",
            human(self.total()),
            human(self.integrals),
            human(self.grid),
            human(self.ao_values),
            human(self.response),
            human(self.matrices)
        )
    }
}

/// "1.5 GiB".
pub fn human(bytes: usize) -> String {
    let b = bytes as f64;
    if b >= (1u64 << 30) as f64 {
        format!("{:.1} GiB", b / (1u64 << 30) as f64)
    } else if b >= (1u64 << 20) as f64 {
        format!("{:.1} MiB", b / (1u64 << 20) as f64)
    } else {
        format!("{:.0} kiB", (b / 1024.0).ceil())
    }
}

/// Estimate for `nbf` basis functions on `atoms` atoms with `electrons`
/// electrons, an optional Kohn–Sham grid and `roots` response roots.
pub fn memory(
    nbf: usize,
    atoms: usize,
    electrons: usize,
    grid: Option<&GridSpec>,
    roots: usize,
    jk: &JkOptions,
) -> MemoryEstimate {
    let f = std::mem::size_of::<f64>();
    let eri = EriStore::bytes_needed(nbf);
    let integrals = if eri <= jk.max_in_core_bytes { eri } else { 0 };
    let points = grid.map_or(0, |g| {
        let radial = g
            .radial
            .unwrap_or_else(|| g.radial_per_row.iter().copied().max().unwrap_or(0));
        atoms * radial * g.angular
    });
    let ao_values = (points * nbf * 4 * f).min(if grid.is_some() { AO_CACHE_BYTES } else { 0 });
    let sf_dimension = (electrons / 2 + 1) * nbf;
    let subspace = (40usize).max(12 * roots.max(1));
    MemoryEstimate {
        integrals,
        grid: points * 4 * f,
        ao_values,
        response: 2 * subspace * sf_dimension * f,
        matrices: 40 * nbf * nbf * f,
    }
}

/// `MemAvailable` of /proc/meminfo (bytes), when readable.
pub fn available_memory() -> Option<usize> {
    let text = std::fs::read_to_string("/proc/meminfo").ok()?;
    let line = text.lines().find(|l| l.starts_with("MemAvailable:"))?;
    let kib: usize = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kib * 1024)
}

#[cfg(test)]
mod tests {
    use super::*;

    // Source: the packed 8-fold store holds n_pair(n_pair+1)/2 doubles,
    // n_pair = nbf(nbf+1)/2 (exact counting); 100 functions → 5050 pairs →
    // 12 753 775 integrals = 102 030 200 bytes; direct builds store none.
    #[test]
    fn integral_storage_is_counted_exactly_and_dropped_when_direct() {
        let jk = JkOptions::default();
        let e = memory(100, 10, 40, None, 4, &jk);
        assert_eq!(e.integrals, 102_030_200);
        assert_eq!(e.grid, 0);
        let direct = JkOptions {
            max_in_core_bytes: 1 << 20,
            ..JkOptions::default()
        };
        assert_eq!(memory(100, 10, 40, None, 4, &direct).integrals, 0);
        let g = GridSpec::level("coarse").unwrap();
        let ks = memory(100, 10, 40, Some(&g), 4, &jk);
        assert!(ks.grid > 0 && ks.ao_values > 0 && ks.ao_values <= AO_CACHE_BYTES);
        assert!(ks.total() > e.total());
        assert_eq!(human(3 << 30), "3.0 GiB");
    }
}
