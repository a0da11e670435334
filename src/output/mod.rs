//! Writing plates: streamed TIFF strips (`tiff`) and the JSON sidecar (`sidecar`).
//! Depends on `encoding` and `job::spec` for what it records; nothing here computes fields.
pub mod sidecar;
pub mod tiff;
