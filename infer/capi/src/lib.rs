//! C interface to Holdfast's advisor (`include/holdfast.h`).
//!
//! An integrator opens an advisor once (model file and grid file), then passes JSON requests
//! (the `holdfast serve` protocol, one object) and receives JSON answers, from any number of
//! threads. Strings returned are owned by the caller and freed with `holdfast_string_free`;
//! the advisor is freed with `holdfast_advisor_free`. No function unwinds into C: a panic
//! inside is caught and reported as an error.
//!
//! Decision support for studies and operators, not a protection scheme: local grid codes,
//! operating procedures and licensed engineers decide.

#![allow(unsafe_code)] // reason: a C interface takes and returns raw pointers; each use states its contract

use std::ffi::{CStr, CString, c_char};
use std::panic::{AssertUnwindSafe, catch_unwind};
use std::path::Path;

use holdfast_infer::{Advisor, answer_json_line};

/// An advisor behind the C interface (opaque to C).
pub struct HoldfastAdvisor(Advisor);

/// The caution, NUL-terminated, for C.
static CAUTION_C: &CStr = c"Decision support for studies and operators, not a protection scheme: \
local grid codes, operating procedures and licensed engineers decide.";

/// A C string the caller frees with [`holdfast_string_free`]; interior NULs (never produced
/// by our JSON) are replaced.
fn to_c(text: String) -> *mut c_char {
    let text = text.replace('\0', " ");
    CString::new(text).map_or(std::ptr::null_mut(), CString::into_raw)
}

/// Reads a C string argument, naming it in the error.
///
/// # Safety
/// `p` is null or points to a NUL-terminated string valid for the call.
unsafe fn arg<'a>(p: *const c_char, name: &str) -> Result<&'a str, String> {
    if p.is_null() {
        return Err(format!("{name} is null"));
    }
    // SAFETY: non-null, and the caller promises a NUL-terminated string that outlives the call.
    let s = unsafe { CStr::from_ptr(p) };
    s.to_str().map_err(|_| format!("{name} is not valid UTF-8"))
}

/// Opens an advisor: reads and checks the model file and the grid file (magic, version,
/// checksum, grid fingerprint). Returns null on failure and, if `error` is not null, stores
/// there a message to free with `holdfast_string_free`.
///
/// # Safety
/// `model_path` and `grid_path` are NUL-terminated UTF-8 strings; `error` is null or points to
/// writable storage for one pointer.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn holdfast_advisor_open(
    model_path: *const c_char,
    grid_path: *const c_char,
    error: *mut *mut c_char,
) -> *mut HoldfastAdvisor {
    let result = catch_unwind(AssertUnwindSafe(|| {
        // SAFETY: forwarded from this function's contract.
        let model = unsafe { arg(model_path, "model_path") }?;
        // SAFETY: as above.
        let grid = unsafe { arg(grid_path, "grid_path") }?;
        Advisor::open(Path::new(model), Path::new(grid)).map_err(|e| e.to_string())
    }))
    .unwrap_or_else(|_| Err("internal error while opening the advisor".to_string()));
    match result {
        Ok(advisor) => Box::into_raw(Box::new(HoldfastAdvisor(advisor))),
        Err(message) => {
            if !error.is_null() {
                // SAFETY: non-null and writable by this function's contract.
                unsafe { *error = to_c(message) };
            }
            std::ptr::null_mut()
        }
    }
}

/// Answers one JSON request (the `holdfast serve` protocol): returns a JSON answer, or
/// `{"id": ..., "error": "..."}`; never null unless memory runs out. Free the result with
/// `holdfast_string_free`. Safe to call from several threads on one advisor.
///
/// # Safety
/// `advisor` comes from `holdfast_advisor_open` and is not yet freed; `request_json` is a
/// NUL-terminated string.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn holdfast_advise_json(
    advisor: *const HoldfastAdvisor,
    request_json: *const c_char,
) -> *mut c_char {
    let refuse = |m: &str| to_c(serde_json::json!({ "id": null, "error": m }).to_string());
    if advisor.is_null() {
        return refuse("advisor is null");
    }
    // SAFETY: non-null, from `holdfast_advisor_open` and alive by this function's contract.
    let advisor = unsafe { &(*advisor).0 };
    // SAFETY: forwarded from this function's contract.
    let request = match unsafe { arg(request_json, "request_json") } {
        Ok(r) => r,
        Err(m) => return refuse(&m),
    };
    match catch_unwind(AssertUnwindSafe(|| answer_json_line(advisor, request))) {
        Ok(answer) => to_c(answer),
        Err(_) => refuse("internal error while advising"),
    }
}

/// Frees a string returned by this library (null is ignored).
///
/// # Safety
/// `s` is null or a string returned by this library and not yet freed.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn holdfast_string_free(s: *mut c_char) {
    if !s.is_null() {
        // SAFETY: created by `CString::into_raw` in this library, freed once by contract.
        drop(unsafe { CString::from_raw(s) });
    }
}

/// Frees an advisor (null is ignored).
///
/// # Safety
/// `advisor` is null or comes from `holdfast_advisor_open`, is not yet freed, and no other
/// thread is using it.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn holdfast_advisor_free(advisor: *mut HoldfastAdvisor) {
    if !advisor.is_null() {
        // SAFETY: created by `Box::into_raw` in `holdfast_advisor_open`, freed once.
        drop(unsafe { Box::from_raw(advisor) });
    }
}

/// The caution to show with any advice (static; do not free).
#[unsafe(no_mangle)]
pub extern "C" fn holdfast_caution() -> *const c_char {
    CAUTION_C.as_ptr()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_caution_matches_the_library_text() {
        assert_eq!(CAUTION_C.to_str(), Ok(holdfast_infer::CAUTION));
    }
}
