#!/usr/bin/env python3
"""Read a flipswarm ensemble part file with h5py alone, check its layout and
print a JSON summary of one trajectory for the Rust test to compare.

Usage: read_part.py PART_FILE TRAJECTORY_INDEX

Exit codes: 0 ok, 1 a check failed (message on stderr), 2 usage,
3 h5py or numpy is not installed.
"""

import json
import sys

try:
    import h5py
    import numpy as np
except ImportError as exc:  # the Rust test turns this into "install h5py"
    print(f"missing Python module {exc.name!r}: install it with `pip install h5py numpy`", file=sys.stderr)
    sys.exit(3)


def fail(message):
    print(f"read_part.py: {message}", file=sys.stderr)
    sys.exit(1)


def check(condition, message):
    if not condition:
        fail(message)


def fnv1a(array):
    """64-bit FNV-1a over the little-endian bytes of `array` in C order."""
    h = 0xCBF29CE484222325
    for b in np.ascontiguousarray(array).astype(array.dtype.newbyteorder("<")).tobytes():
        h ^= b
        h = (h * 0x100000001B3) & 0xFFFFFFFFFFFFFFFF
    return f"{h:016x}"


def check_root(f):
    attrs = f.attrs
    check(attrs["format"] == "flipswarm-ensemble", f"format = {attrs.get('format')!r}")
    check(int(attrs["format_version"]) == 1, "format_version is not 1")
    check(attrs["writer_state"] == "closed", f"writer_state = {attrs['writer_state']!r}")
    for name in ["program_version", "created", "config_toml", "units_convention", "description"]:
        check(isinstance(attrs[name], str) and attrs[name], f"root attribute {name} is not a non-empty string")
    check(attrs["created"].endswith("Z"), "created is not UTC")
    for name in ["n_states", "n_dof", "slice_index", "slice_count"]:
        check(np.issubdtype(type(attrs[name]), np.integer), f"root attribute {name} is not an integer")
    check(isinstance(attrs["timestep_au"], (float, np.floating)), "timestep_au is not a float")
    check(f["masses"].dtype == np.float64 and f["masses"].shape == (int(attrs["n_dof"]),), "masses")


def check_units(f):
    missing = []

    def visit(name, obj):
        if isinstance(obj, h5py.Dataset):
            for key in ("units", "description"):
                if not isinstance(obj.attrs.get(key), str) or not obj.attrs[key]:
                    missing.append(f"{name}:{key}")

    f.visititems(visit)
    check(not missing, f"datasets without units/description: {missing}")


def check_trajectory(g, n_states, n_dof):
    n = int(g.attrs["steps_written"])
    h = int(g.attrs["hops_written"])
    expected = {
        "time": (np.float64, (n,)),
        "step": (np.uint64, (n,)),
        "positions": (np.float64, (n, n_dof)),
        "velocities": (np.float64, (n, n_dof)),
        "energies": (np.float64, (n, n_states)),
        "active_state": (np.uint32, (n,)),
        "amplitudes": (np.complex128, (n, n_states)),
        "kinetic_energy": (np.float64, (n,)),
        "potential_energy": (np.float64, (n,)),
        "total_energy": (np.float64, (n,)),
        "initial_positions": (np.float64, (n_dof,)),
        "initial_velocities": (np.float64, (n_dof,)),
        "hops/step": (np.uint64, (h,)),
        "hops/time": (np.float64, (h,)),
        "hops/from_state": (np.uint32, (h,)),
        "hops/to_state": (np.uint32, (h,)),
        "hops/accepted": (np.uint8, (h,)),
        "hops/energy_gap": (np.float64, (h,)),
        "hops/kinetic_before": (np.float64, (h,)),
        "hops/kinetic_after": (np.float64, (h,)),
        "solver_iterations": (np.int32, (n,)),
        "response_iterations": (np.int32, (n,)),
        "spin_squared": (np.float64, (n, n_states)),
    }
    w = int(g.attrs["warnings_written"])
    check(g["warnings/step"].dtype == np.uint64 and g["warnings/step"].shape == (w,), "warnings/step dtype or shape")
    check(h5py.check_string_dtype(g["warnings/text"].dtype) is not None, f"warnings/text is not a string dataset ({g['warnings/text'].dtype})")
    check(g["warnings/text"].shape == (w,), "warnings/text shape")
    check(isinstance(g["warnings"].attrs.get("description"), str), "warnings group has no description")
    for name, (dtype, shape) in expected.items():
        ds = g[name]
        check(ds.dtype == np.dtype(dtype), f"{ds.name}: dtype {ds.dtype}, expected {np.dtype(dtype)}")
        check(ds.shape == shape, f"{ds.name}: shape {ds.shape}, expected {shape}")
    check(g["energies"].attrs["units"] == "hartree", "energies are not in hartree")
    check(g["time"].attrs["units"] == "a.u. of time", "time units")
    check(g["positions"].attrs["units"].startswith("bohr"), "positions units")
    check(g["spin_squared"].attrs["units"] == "hbar^2", "spin_squared units")
    for name in ["solver_iterations", "response_iterations"]:
        check(g[name].attrs["units"] == "1", f"{name} units")
        check("-1" in g[name].attrs["description"], f"{name} description does not say what -1 means")
    check("NaN" in g["spin_squared"].attrs["description"], "spin_squared description does not say what NaN means")


def main():
    if len(sys.argv) != 3:
        print(__doc__, file=sys.stderr)
        sys.exit(2)
    path, index = sys.argv[1], int(sys.argv[2])
    with h5py.File(path, "r") as f:
        check_root(f)
        check_units(f)
        n_states, n_dof = int(f.attrs["n_states"]), int(f.attrs["n_dof"])
        g = f[f"trajectories/{index:06d}"]
        check(int(g.attrs["index"]) == index, "index attribute")
        check_trajectory(g, n_states, n_dof)
        amplitudes = g["amplitudes"][...]
        names = ["time", "positions", "velocities", "energies", "amplitudes", "total_energy", "step", "hops/energy_gap"]
        summary = {
            "n_states": n_states,
            "n_dof": n_dof,
            "trajectories": [int(i) for i in f["trajectory_indices"][...]],
            "status": g.attrs["status"],
            "end_reason": g.attrs["end_reason"],
            "seed": int(g.attrs["seed"]),
            "steps": int(g["time"].shape[0]),
            "hops": int(g["hops/step"].shape[0]),
            "fnv1a": {name: fnv1a(g[name][...]) for name in names},
            "last_positions": [float(x) for x in g["positions"][-1]],
            "last_amplitudes_re_im": [float(x) for z in amplitudes[-1] for x in (z.real, z.imag)],
            "active_state": [int(x) for x in g["active_state"][...]],
            "accepted": [int(x) for x in g["hops/accepted"][...]],
            "solver_iterations": [int(x) for x in g["solver_iterations"][...]],
            "spin_squared_nan": int(np.isnan(g["spin_squared"][...]).sum()),
            "warnings": [[int(s), t.decode() if isinstance(t, bytes) else t] for s, t in zip(g["warnings/step"][...], g["warnings/text"][...])],
        }
    print(json.dumps(summary))


if __name__ == "__main__":
    main()
