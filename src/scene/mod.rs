//! Scenes: what the plate records. Point clouds read from PLY or CSV.
pub mod points;
pub mod mesh;
pub mod sampling;
pub mod bvh;
