//! Writing plates: streamed TIFF strips (`tiff`), GDSII layouts of binary plates (`gdsii`),
//! modulator PNG images (`panel_png`), the JSON sidecar's format (`sidecar`), small files replaced
//! atomically (`atomic`), checksums of partial files (`chunks`), and the output guard (`guard`:
//! an output never replaces an input, one writer per plate). Depends on `error` only: `job` fills
//! in what the sidecar records; nothing here computes fields.
pub mod atomic;
pub mod chunks;
pub mod gdsii;
pub mod guard;
pub mod manifest;
pub mod panel_png;
pub mod sidecar;
pub mod tiff;
