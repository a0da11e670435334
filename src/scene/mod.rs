//! Scenes: what the plate records. Point clouds read from PLY or CSV, meshes from glTF, OBJ, STL
//! or PLY.
pub mod bvh;
pub mod mesh;
mod ply;
pub mod points;
pub mod sampling;
pub mod spots;
mod text;
