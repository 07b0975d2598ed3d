//! bitloupe's core: read one weight tensor, quantize it with a recipe, and measure how large the
//! error is, where it lands, which input columns cause it, and what the choice costs in bits.
//!
//! Plain Rust with no browser or command-line types; the native binary (`main.rs`) and the
//! WebAssembly boundary (`wasm.rs`, wasm32 only) are thin shells over the same calls:
//! [`tensor::list`] / [`tensor::read`] (or [`tensor::text::parse`], [`demo::weight`]) to open a
//! tensor, [`analyze`] to run a recipe, and [`report::Report`] to read the result.

#![deny(missing_docs)]

pub mod analysis;
pub mod calib;
pub mod checkpoint;
pub mod cost;
pub mod demo;
pub mod error;
pub mod footprint;
pub mod formats;
pub mod grid;
pub mod linalg;
pub mod methods;
pub mod metrics;
pub mod packed;
pub mod recipe;
pub mod report;
pub mod rows;
pub mod simd;
pub mod sizing;
pub mod sweep;
pub mod tensor;

#[cfg(target_arch = "wasm32")]
pub mod wasm;

pub use analysis::{analyze, analyze_with, Analysis};
pub use error::{Error, Result};
pub use recipe::{Granularity, Recipe, ScaleDType};
pub use tensor::{ByteSource, DType, ReadOptions, Tensor};
