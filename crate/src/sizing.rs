//! The size of a whole model under one recipe, from the headers of its `.safetensors` shards (or
//! a parameter count). Selected tensors are costed exactly as `cost` costs one tensor (in their
//! 2-D view); the others stay in their stored type. Activations, caches and runtime overhead are
//! not counted.

use crate::checkpoint::{skip_reason, Selection};
use crate::cost::BitCost;
use crate::recipe::Recipe;
use crate::tensor::TensorEntry;
use serde::Serialize;

/// The size of a model under a recipe.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ModelSize {
    /// Tensors the recipe applies to.
    pub quantized_tensors: usize,
    /// Their elements.
    pub quantized_params: u64,
    /// Their bytes under the recipe (all parts counted).
    pub quantized_bytes: u64,
    /// Their bytes as stored now.
    pub quantized_source_bytes: u64,
    /// Tensors left as they are.
    pub other_tensors: usize,
    /// Their elements.
    pub other_params: u64,
    /// Their bytes as stored.
    pub other_bytes: u64,
    /// Everything, in bytes.
    pub total_bytes: u64,
}

/// The size of `params` weights under `recipe`, costed as 4096-column rows of bf16 sources (a
/// typical projection layer's width).
pub fn model_size_from_count(params: u64, recipe: &Recipe) -> ModelSize {
    const COLS: u64 = 4096;
    let rows = params.div_ceil(COLS);
    let quantized_bytes = BitCost::of_shape(recipe, rows, COLS, 16).bytes;
    ModelSize {
        quantized_tensors: 1,
        quantized_params: rows * COLS,
        quantized_bytes,
        quantized_source_bytes: rows * COLS * 2,
        other_tensors: 0,
        other_params: 0,
        other_bytes: 0,
        total_bytes: quantized_bytes,
    }
}

/// Whether `name` matches `pattern`, where `*` stands for any run of characters.
pub fn matches(pattern: &str, name: &str) -> bool {
    let parts: Vec<&str> = pattern.split('*').collect();
    if parts.len() == 1 {
        return pattern == name;
    }
    let (first, last) = (parts[0], parts[parts.len() - 1]);
    if !name.starts_with(first) || !name[first.len()..].ends_with(last) || name.len() < first.len() + last.len() {
        return false;
    }
    let mut rest = &name[first.len()..name.len() - last.len()];
    for part in &parts[1..parts.len() - 1] {
        match rest.find(part) {
            Some(at) => rest = &rest[at + part.len()..],
            None => return false,
        }
    }
    true
}

/// The size of the model whose tensors are `entries` when the recipe is applied to the tensors
/// `selection` takes: the ones `bitloupe report` quantizes with it (its memory limit aside).
pub fn model_size(entries: &[TensorEntry], selection: &Selection, recipe: &Recipe) -> ModelSize {
    let mut size = ModelSize {
        quantized_tensors: 0,
        quantized_params: 0,
        quantized_bytes: 0,
        quantized_source_bytes: 0,
        other_tensors: 0,
        other_params: 0,
        other_bytes: 0,
        total_bytes: 0,
    };
    for e in entries {
        let count: u64 = e.shape.iter().map(|&d| d as u64).product();
        let selected = skip_reason(e, selection).is_none();
        match (selected, e.shape.split_first()) {
            // The 2-D view of `tensor`, in 64-bit arithmetic: no tensor is loaded here.
            (true, Some((&rows, rest))) => {
                let (rows, cols) = if rest.is_empty() { (1, rows as u64) } else { (rows as u64, count / rows as u64) };
                let source_bits = e.element.map_or(16, |el| el.dtype.bits());
                size.quantized_tensors += 1;
                size.quantized_params += count;
                size.quantized_bytes += BitCost::of_shape(recipe, rows, cols, source_bits).bytes;
                size.quantized_source_bytes += e.bytes;
            }
            _ => {
                size.other_tensors += 1;
                size.other_params += count;
                size.other_bytes += e.bytes;
            }
        }
    }
    size.total_bytes = size.quantized_bytes + size.other_bytes;
    size
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::tensor::{DType, Element};

    fn entry(name: &str, shape: &[usize], dtype: DType) -> TensorEntry {
        let count: usize = shape.iter().product();
        TensorEntry {
            name: name.into(),
            dtype_label: dtype.name().into(),
            element: Some(Element::little(dtype)),
            shape: shape.to_vec(),
            offset: 0,
            bytes: (count * dtype.size()) as u64,
            fortran_order: false,
        }
    }

    #[test]
    fn patterns_use_stars_for_any_run() {
        assert!(matches("*", "a.b"));
        assert!(matches("*.weight", "layers.3.proj.weight"));
        assert!(matches("layers.*.proj.*", "layers.3.proj.weight"));
        assert!(!matches("*.bias", "layers.3.proj.weight"));
        assert!(matches("exact", "exact") && !matches("exact", "exactly"));
        assert!(!matches("a*a", "a"));
    }

    #[test]
    fn selected_weights_are_costed_and_the_rest_kept() {
        let entries = [
            entry("block.0.proj.weight", &[4096, 4096], DType::BF16),
            entry("block.1.proj.weight", &[4096, 4096], DType::BF16),
            entry("block.0.norm.weight", &[4096], DType::F32),
            entry("embed.weight", &[1000, 4096], DType::BF16),
        ];
        let selection = Selection { pattern: "block.*.weight".into(), include_1d: false, available_memory: None };
        let size = model_size(&entries, &selection, &Recipe::default());
        assert_eq!((size.quantized_tensors, size.other_tensors), (2, 2));
        // int4 asym g128 f16: 4.15625 bits per weight exactly for 4096 columns.
        assert_eq!(size.quantized_bytes, 2 * 4096 * 4096 * 415625 / 800000);
        assert_eq!(size.other_bytes, 4096 * 4 + 1000 * 4096 * 2);
        assert_eq!(size.total_bytes, size.quantized_bytes + size.other_bytes);
    }
}
