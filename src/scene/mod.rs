//! Scenes: what the plate records. Point clouds read from PLY or CSV.
pub mod bvh;
pub mod mesh;
pub mod points;
pub mod sampling;
