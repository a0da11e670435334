//! The fields manifest (`NAME.fields.json`) of a plate written as write fields: one serde type,
//! written by `job` and read by `replay`. Keys are written in sorted order (the file's layout
//! since format version 1).

use serde::{Deserialize, Serialize};

/// The `format` value of a fields manifest.
pub const FORMAT: &str = "fringemill-fields";

/// One finished field.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct FieldEntry {
    /// File name (in the output's folder).
    pub file: String,
    /// Field row (0 = top).
    pub row: u32,
    /// Field column (0 = left).
    pub col: u32,
    /// Plate pixel of the field's top-left pixel: [column, row].
    pub first_px: [u32; 2],
    /// Size in pixels [w, h].
    pub size_px: [u32; 2],
    /// Plate coordinates of the field's top-left corner (pixel edge, not centre), mm: [x, y], y up.
    pub origin_mm: [f64; 2],
    /// Physical size [w, h], mm.
    pub size_mm: [f64; 2],
    /// File size.
    pub bytes: u64,
    /// SHA-256 of the file.
    pub sha256: String,
}

/// The manifest of a finished field set.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct FieldsManifest {
    /// [`FORMAT`].
    pub format: String,
    /// 1.
    pub format_version: u32,
    /// SHA-256 of the job file.
    pub job_sha256: String,
    /// Plate size [w, h], pixels.
    pub plate_px: [u32; 2],
    /// Pixel pitch [x, y], micrometres.
    pub pitch_um: [f64; 2],
    /// Field size [w, h], pixels (the last row and column may be smaller).
    pub field_px: [u32; 2],
    /// Field columns.
    pub fields_x: u32,
    /// Field rows.
    pub fields_y: u32,
    /// What `origin_mm` means, in words.
    pub origin_convention: String,
    /// The fields, row by row from the top.
    pub fields: Vec<FieldEntry>,
}

impl FieldsManifest {
    /// The file's text: pretty JSON with keys in sorted order.
    pub fn to_text(&self) -> String {
        // Through a `Value`, whose maps sort their keys: the same bytes as before the type.
        let v = serde_json::to_value(self).expect("a manifest is plain data");
        serde_json::to_string_pretty(&v).expect("a value serializes")
    }
}
