//! Writing plates: streamed TIFF strips (`tiff`), the JSON sidecar's format (`sidecar`) and
//! small files replaced atomically (`atomic`). Depends on `encoding` and `error` only: `job`
//! fills in what the sidecar records; nothing here computes fields.
pub mod atomic;
pub mod chunks;
pub mod gdsii;
pub mod panel_png;
pub mod sidecar;
pub mod tiff;
