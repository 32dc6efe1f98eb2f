//! Raw declarations of the libxc 5.2 C entry points that flipswarm uses, and
//! the one owning handle around an `xc_func_type`.
//!
//! Only stable functions of `xc.h` (libxc 5.2.3, the Debian `libxc-dev`
//! package) are declared, with the argument lists of that header. The
//! functional object is allocated by libxc itself (`xc_func_alloc`), so its
//! layout never enters Rust: it is an opaque type behind a pointer. Everything
//! `unsafe` about libxc lives in this file.

use std::ffi::{CStr, CString};
use std::os::raw::{c_char, c_double, c_int};
use std::ptr::NonNull;

/// libxc's `xc_func_type`, opaque.
#[repr(C)]
pub(super) struct XcFuncType {
    _opaque: [u8; 0],
    // not Send, not Sync, not Unpin by default; the owner decides
    _marker: std::marker::PhantomData<(*mut u8, std::marker::PhantomPinned)>,
}

/// libxc's `xc_func_info_type`, opaque.
#[repr(C)]
pub(super) struct XcFuncInfoType {
    _opaque: [u8; 0],
    _marker: std::marker::PhantomData<(*mut u8, std::marker::PhantomPinned)>,
}

pub(super) const XC_UNPOLARIZED: c_int = 1;
pub(super) const XC_POLARIZED: c_int = 2;

pub(super) const XC_EXCHANGE: c_int = 0;
pub(super) const XC_CORRELATION: c_int = 1;
pub(super) const XC_EXCHANGE_CORRELATION: c_int = 2;
pub(super) const XC_KINETIC: c_int = 3;

pub(super) const XC_FAMILY_LDA: c_int = 1;
pub(super) const XC_FAMILY_GGA: c_int = 2;
pub(super) const XC_FAMILY_MGGA: c_int = 4;
pub(super) const XC_FAMILY_LCA: c_int = 8;
pub(super) const XC_FAMILY_OEP: c_int = 16;
pub(super) const XC_FAMILY_HYB_GGA: c_int = 32;
pub(super) const XC_FAMILY_HYB_MGGA: c_int = 64;
pub(super) const XC_FAMILY_HYB_LDA: c_int = 128;

pub(super) const XC_FLAGS_HAVE_EXC: c_int = 1 << 0;
pub(super) const XC_FLAGS_HAVE_VXC: c_int = 1 << 1;
pub(super) const XC_FLAGS_HAVE_FXC: c_int = 1 << 2;
pub(super) const XC_FLAGS_3D: c_int = 1 << 7;
pub(super) const XC_FLAGS_HYB_CAM: c_int = 1 << 8;
pub(super) const XC_FLAGS_HYB_CAMY: c_int = 1 << 9;
pub(super) const XC_FLAGS_VV10: c_int = 1 << 10;
pub(super) const XC_FLAGS_HYB_LC: c_int = 1 << 11;
pub(super) const XC_FLAGS_HYB_LCY: c_int = 1 << 12;

#[link(name = "xc")]
extern "C" {
    fn xc_version(major: *mut c_int, minor: *mut c_int, micro: *mut c_int);
    fn xc_version_string() -> *const c_char;

    fn xc_functional_get_number(name: *const c_char) -> c_int;
    fn xc_functional_get_name(number: c_int) -> *mut c_char;
    fn xc_number_of_functionals() -> c_int;
    fn xc_available_functional_numbers(list: *mut c_int);

    fn xc_func_alloc() -> *mut XcFuncType;
    fn xc_func_init(p: *mut XcFuncType, functional: c_int, nspin: c_int) -> c_int;
    fn xc_func_end(p: *mut XcFuncType);
    fn xc_func_free(p: *mut XcFuncType);
    fn xc_func_get_info(p: *const XcFuncType) -> *const XcFuncInfoType;
    fn xc_func_set_dens_threshold(p: *mut XcFuncType, t_dens: c_double);

    fn xc_func_info_get_kind(info: *const XcFuncInfoType) -> c_int;
    fn xc_func_info_get_name(info: *const XcFuncInfoType) -> *const c_char;
    fn xc_func_info_get_family(info: *const XcFuncInfoType) -> c_int;
    fn xc_func_info_get_flags(info: *const XcFuncInfoType) -> c_int;

    fn xc_hyb_exx_coef(p: *const XcFuncType) -> c_double;
    fn xc_num_aux_funcs(p: *const XcFuncType) -> c_int;
    fn xc_aux_func_ids(p: *const XcFuncType, ids: *mut c_int);
    fn xc_aux_func_weights(p: *const XcFuncType, weights: *mut c_double);

    fn xc_lda_exc(p: *const XcFuncType, np: usize, rho: *const c_double, zk: *mut c_double);
    fn xc_lda_exc_vxc(
        p: *const XcFuncType,
        np: usize,
        rho: *const c_double,
        zk: *mut c_double,
        vrho: *mut c_double,
    );
    fn xc_lda_exc_vxc_fxc(
        p: *const XcFuncType,
        np: usize,
        rho: *const c_double,
        zk: *mut c_double,
        vrho: *mut c_double,
        v2rho2: *mut c_double,
    );
    fn xc_gga_exc(
        p: *const XcFuncType,
        np: usize,
        rho: *const c_double,
        sigma: *const c_double,
        zk: *mut c_double,
    );
    fn xc_gga_exc_vxc(
        p: *const XcFuncType,
        np: usize,
        rho: *const c_double,
        sigma: *const c_double,
        zk: *mut c_double,
        vrho: *mut c_double,
        vsigma: *mut c_double,
    );
    #[allow(clippy::too_many_arguments)]
    fn xc_gga_exc_vxc_fxc(
        p: *const XcFuncType,
        np: usize,
        rho: *const c_double,
        sigma: *const c_double,
        zk: *mut c_double,
        vrho: *mut c_double,
        vsigma: *mut c_double,
        v2rho2: *mut c_double,
        v2rhosigma: *mut c_double,
        v2sigma2: *mut c_double,
    );
}

/// Copies a C string owned by libxc (static storage).
fn static_str(p: *const c_char) -> String {
    if p.is_null() {
        return String::new();
    }
    // SAFETY: libxc returns NUL-terminated strings in static storage.
    unsafe { CStr::from_ptr(p) }.to_string_lossy().into_owned()
}

/// The version of the linked libxc, as its `xc_version_string` reports it.
pub(super) fn version_string() -> String {
    // SAFETY: no arguments; returns a static string.
    static_str(unsafe { xc_version_string() })
}

/// (major, minor, micro) of the linked libxc.
pub(super) fn version() -> (i32, i32, i32) {
    let (mut a, mut b, mut c) = (0, 0, 0);
    // SAFETY: three valid out-pointers.
    unsafe { xc_version(&mut a, &mut b, &mut c) };
    (a, b, c)
}

/// libxc's id for a functional name (case-insensitive, optional `XC_`
/// prefix), or `None`.
pub(super) fn number_of_name(name: &str) -> Option<i32> {
    let c = CString::new(name).ok()?;
    // SAFETY: valid NUL-terminated string; libxc only reads it.
    let id = unsafe { xc_functional_get_number(c.as_ptr()) };
    (id > 0).then_some(id)
}

/// libxc's (lower-case) name of functional `id`, or `None`.
pub(super) fn name_of_number(id: i32) -> Option<String> {
    // SAFETY: libxc returns a freshly malloc'ed copy (or NULL) that the caller
    // owns; it is freed with `free` right after copying.
    unsafe {
        let p = xc_functional_get_name(id);
        if p.is_null() {
            return None;
        }
        let s = CStr::from_ptr(p).to_string_lossy().into_owned();
        libc::free(p.cast());
        Some(s)
    }
}

/// The names of all functionals of the linked libxc.
pub(super) fn all_names() -> Vec<String> {
    // SAFETY: the list is sized by libxc's own count.
    let ids = unsafe {
        let n = xc_number_of_functionals().max(0) as usize;
        let mut ids = vec![0 as c_int; n];
        if n > 0 {
            xc_available_functional_numbers(ids.as_mut_ptr());
        }
        ids
    };
    ids.into_iter().filter_map(name_of_number).collect()
}

/// Static facts about an initialised functional.
#[derive(Debug, Clone, Copy)]
pub(super) struct Info {
    pub family: c_int,
    pub kind: c_int,
    pub flags: c_int,
}

/// One initialised libxc functional object, owned; freed on drop.
pub(super) struct Func {
    ptr: NonNull<XcFuncType>,
    polarized: bool,
}

impl Func {
    /// Allocates and initialises functional `id` for `nspin` (1 or 2);
    /// `None` if libxc refuses (unknown id) or allocation fails.
    pub(super) fn new(id: i32, nspin: c_int) -> Option<Func> {
        // SAFETY: xc_func_alloc returns an uninitialised object or NULL;
        // it is initialised before any other use and freed on failure.
        unsafe {
            let ptr = NonNull::new(xc_func_alloc())?;
            if xc_func_init(ptr.as_ptr(), id, nspin) != 0 {
                xc_func_free(ptr.as_ptr());
                return None;
            }
            Some(Func {
                ptr,
                polarized: nspin == XC_POLARIZED,
            })
        }
    }

    fn raw(&self) -> *const XcFuncType {
        self.ptr.as_ptr()
    }

    pub(super) fn info(&self) -> Info {
        // SAFETY: initialised object; the info block is static in libxc.
        unsafe {
            let info = xc_func_get_info(self.raw());
            Info {
                family: xc_func_info_get_family(info),
                kind: xc_func_info_get_kind(info),
                flags: xc_func_info_get_flags(info),
            }
        }
    }

    /// libxc's descriptive name, e.g. "Becke 88".
    pub(super) fn description(&self) -> String {
        // SAFETY: initialised object; static string.
        static_str(unsafe { xc_func_info_get_name(xc_func_get_info(self.raw())) })
    }

    /// Fraction of exact exchange (`xc_hyb_exx_coef`); meaningful for hybrids.
    pub(super) fn exx_coef(&self) -> f64 {
        // SAFETY: initialised object.
        unsafe { xc_hyb_exx_coef(self.raw()) }
    }

    /// The (id, weight) pairs of a libxc mixture (empty for a plain functional).
    pub(super) fn aux(&self) -> Vec<(i32, f64)> {
        // SAFETY: buffers sized by libxc's own count.
        unsafe {
            let n = xc_num_aux_funcs(self.raw()).max(0) as usize;
            if n == 0 {
                return Vec::new();
            }
            let mut ids = vec![0 as c_int; n];
            let mut w = vec![0.0; n];
            xc_aux_func_ids(self.raw(), ids.as_mut_ptr());
            xc_aux_func_weights(self.raw(), w.as_mut_ptr());
            ids.into_iter().zip(w).collect()
        }
    }

    /// Sets libxc's density threshold (also on the parts of a mixture).
    pub(super) fn set_dens_threshold(&mut self, t: f64) {
        // SAFETY: initialised object, exclusively borrowed.
        unsafe { xc_func_set_dens_threshold(self.ptr.as_ptr(), t) }
    }

    /// LDA evaluation of `np` points into libxc-layout buffers: `rho` np·ns,
    /// `zk` np, `vrho` np·ns, `v2rho2` np·(1 or 3) (ns = 1 or 2). The sizes
    /// are checked (the callers validate user input first, so a failure here
    /// is a bug of this module, not of the input).
    pub(super) fn lda(
        &self,
        np: usize,
        rho: &[f64],
        zk: &mut [f64],
        vrho: Option<&mut [f64]>,
        v2rho2: Option<&mut [f64]>,
    ) {
        let (nr, nrr) = if self.polarized { (2, 3) } else { (1, 1) };
        assert!(
            rho.len() >= np * nr && zk.len() >= np,
            "libxc LDA buffers too short"
        );
        assert!(
            vrho.as_ref().is_none_or(|v| v.len() >= np * nr),
            "libxc vrho buffer too short"
        );
        assert!(
            v2rho2.as_ref().is_none_or(|v| v.len() >= np * nrr),
            "libxc v2rho2 buffer too short"
        );
        if np == 0 {
            return;
        }
        // SAFETY: the functional is initialised; every buffer holds at least
        // np times libxc's dimension for this spin case (checked above), and
        // libxc writes exactly that many values.
        unsafe {
            match (vrho, v2rho2) {
                (Some(v), Some(f)) => xc_lda_exc_vxc_fxc(
                    self.raw(),
                    np,
                    rho.as_ptr(),
                    zk.as_mut_ptr(),
                    v.as_mut_ptr(),
                    f.as_mut_ptr(),
                ),
                (Some(v), None) => xc_lda_exc_vxc(
                    self.raw(),
                    np,
                    rho.as_ptr(),
                    zk.as_mut_ptr(),
                    v.as_mut_ptr(),
                ),
                _ => xc_lda_exc(self.raw(), np, rho.as_ptr(), zk.as_mut_ptr()),
            }
        }
    }

    /// GGA evaluation of `np` points into libxc-layout buffers (`rho` np·ns,
    /// `sigma` np·(1 or 3), `zk` np, first = (vrho, vsigma), second =
    /// (v2rho2, v2rhosigma, v2sigma2) of np·(1|3), np·(1|6), np·(1|6)).
    /// Sizes are checked as in [`Func::lda`]; second derivatives are only
    /// computed together with the first.
    pub(super) fn gga(
        &self,
        np: usize,
        rho: &[f64],
        sigma: &[f64],
        zk: &mut [f64],
        first: Option<(&mut [f64], &mut [f64])>,
        second: Option<(&mut [f64], &mut [f64], &mut [f64])>,
    ) {
        let (nr, ns, nrr, nrs, nss) = if self.polarized {
            (2, 3, 3, 6, 6)
        } else {
            (1, 1, 1, 1, 1)
        };
        assert!(
            rho.len() >= np * nr && sigma.len() >= np * ns && zk.len() >= np,
            "libxc GGA input buffers too short"
        );
        assert!(
            first
                .as_ref()
                .is_none_or(|(a, b)| a.len() >= np * nr && b.len() >= np * ns),
            "libxc GGA first-derivative buffers too short"
        );
        assert!(
            second.as_ref().is_none_or(|(a, b, c)| a.len() >= np * nrr
                && b.len() >= np * nrs
                && c.len() >= np * nss),
            "libxc GGA second-derivative buffers too short"
        );
        if np == 0 {
            return;
        }
        // SAFETY: the functional is initialised; every buffer holds at least
        // np times libxc's dimension for this spin case (checked above), and
        // libxc writes exactly that many values.
        unsafe {
            match (first, second) {
                (Some((vr, vs)), Some((f1, f2, f3))) => xc_gga_exc_vxc_fxc(
                    self.raw(),
                    np,
                    rho.as_ptr(),
                    sigma.as_ptr(),
                    zk.as_mut_ptr(),
                    vr.as_mut_ptr(),
                    vs.as_mut_ptr(),
                    f1.as_mut_ptr(),
                    f2.as_mut_ptr(),
                    f3.as_mut_ptr(),
                ),
                (Some((vr, vs)), None) => xc_gga_exc_vxc(
                    self.raw(),
                    np,
                    rho.as_ptr(),
                    sigma.as_ptr(),
                    zk.as_mut_ptr(),
                    vr.as_mut_ptr(),
                    vs.as_mut_ptr(),
                ),
                _ => xc_gga_exc(
                    self.raw(),
                    np,
                    rho.as_ptr(),
                    sigma.as_ptr(),
                    zk.as_mut_ptr(),
                ),
            }
        }
    }
}

impl Drop for Func {
    fn drop(&mut self) {
        // SAFETY: the object was initialised by xc_func_init and is owned
        // exclusively; end releases its internals, free the allocation.
        unsafe {
            xc_func_end(self.ptr.as_ptr());
            xc_func_free(self.ptr.as_ptr());
        }
    }
}
