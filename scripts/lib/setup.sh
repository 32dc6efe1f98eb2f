# Shared set-up for scripts/demo, scripts/check and scripts/bench.
# Installs only what is missing, from Debian packages and the Rust toolchain
# already on the machine; nothing is downloaded from anywhere else.
set -euo pipefail

ROOT="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
export CARGO_TERM_COLOR="${CARGO_TERM_COLOR:-never}"

say() { printf '==> %s\n' "$*"; }

# need_debian PACKAGE...: install the Debian packages that are not installed.
need_debian() {
    local missing=()
    for p in "$@"; do
        dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed" || missing+=("$p")
    done
    [ ${#missing[@]} -eq 0 ] && return 0
    say "installing Debian packages: ${missing[*]}"
    local sudo=""
    [ "$(id -u)" -ne 0 ] && sudo="sudo"
    $sudo apt-get update -qq
    DEBIAN_FRONTEND=noninteractive $sudo apt-get install -y -qq --no-install-recommends "${missing[@]}"
}

# need_rust: cargo must be on PATH (Debian's cargo package is the fallback).
need_rust() {
    if ! command -v cargo >/dev/null 2>&1; then
        [ -x "$HOME/.cargo/bin/cargo" ] && export PATH="$HOME/.cargo/bin:$PATH"
    fi
    if ! command -v cargo >/dev/null 2>&1; then
        need_debian cargo rustc
    fi
    say "$(cargo --version)"
}

# The system libraries the crate links against (HDF5 from Debian).
need_system_libraries() {
    need_debian pkg-config gcc libhdf5-dev libxc-dev
}

# need_python_module MODULE PACKAGE...: pip-install PACKAGEs from PyPI when
# MODULE cannot be imported (used by the interoperability tests).
need_python_module() {
    local module="$1"; shift
    if ! command -v python3 >/dev/null 2>&1; then
        need_debian python3 python3-pip
    fi
    python3 -c "import $module" 2>/dev/null && return 0
    say "installing Python packages from PyPI: $*"
    python3 -m pip install --quiet "$@" 2>/dev/null \
        || python3 -m pip install --quiet --break-system-packages "$@"
}
