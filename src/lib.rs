//! fringemill: computes fringe patterns (computer-generated holograms) on the CPU.
pub mod error;
pub mod output;
pub mod scene;
pub use error::{Error, Result};
