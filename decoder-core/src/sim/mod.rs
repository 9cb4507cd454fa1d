//! Synthetic data for the demo, the tests and the benchmarks: a seeded
//! reaching block with cosine-tuned channels, and a simulated user who
//! drives a decoder in closed loop. Never used on the per-bin path.

pub mod drift;
pub mod features;
pub mod model;
pub mod reaching;
pub mod user;
