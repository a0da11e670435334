//! Writing plates: streamed TIFF strips and the JSON sidecar.
pub mod tiff;
