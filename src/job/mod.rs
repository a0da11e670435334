//! Jobs: the job file, running it end to end, planning it, and reporting progress.
//! This is the only module that connects scenes, synthesis, encoding and output.

pub mod batch;
pub mod estimate;
pub mod fields;
pub mod iterative;
pub mod journal;
pub mod plan;
mod prepare;
pub mod progress;
pub mod record;
mod resume;
pub mod run;
pub mod scene;
pub mod shard;
pub mod space;
pub mod spec;
mod stream;

pub use plan::{plan, PlanReport};
pub use prepare::{default_band_rows, sidecar_path, tiff_layout};
pub use progress::ProgressMode;
pub use run::{build_emitters, run_job, RunOptions, RunSummary};
pub use shard::{assemble, part_path, shard_strips, Shard};
pub use space::{check_space, free_bytes};
pub use spec::JobSpec;
