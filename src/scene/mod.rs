//! Scenes: what the plate records. Point clouds read from PLY or CSV.
pub mod points;
