//! Weight storage: little-endian `f32` bytes, and symmetric per-output-row
//! int8 quantization (common practice) exactly as the runtime dequantizes
//! it, `w[j][i] = scales[j] * values[j][i]` (`format::WeightsDesc::Int8`).

/// How a layer's weights are stored in the blob.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Precision {
    /// Full-precision weights.
    F32,
    /// int8 values with one `f32` scale per output row.
    Int8,
}

impl Precision {
    /// Lower-case name for file names and reports.
    pub fn name(self) -> &'static str {
        match self {
            Self::F32 => "f32",
            Self::Int8 => "int8",
        }
    }
}

/// The little-endian bytes of `values`.
pub fn f32_bytes(values: &[f32]) -> Vec<u8> {
    values.iter().flat_map(|v| v.to_le_bytes()).collect()
}

/// Quantize row-major `w` (rows of `inputs` values): per row,
/// scale = max |w| / 127 (1 for an all-zero row) and
/// value = round(w / scale) clamped to [-127, 127]. Returns the values and
/// the scales.
pub fn quantize_rows(w: &[f32], inputs: usize) -> (Vec<i8>, Vec<f32>) {
    let mut values = Vec::with_capacity(w.len());
    let mut scales = Vec::with_capacity(w.len() / inputs.max(1));
    for row in w.chunks(inputs.max(1)) {
        let max = row.iter().fold(0.0f32, |m, v| m.max(v.abs()));
        let scale = if max > 0.0 { max / 127.0 } else { 1.0 };
        scales.push(scale);
        values.extend(
            row.iter()
                .map(|v| (v / scale).round().clamp(-127.0, 127.0) as i8),
        );
    }
    (values, scales)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn int8_rows_reconstruct_within_half_a_step() {
        // Symmetric per-row quantization (common practice): every value
        // dequantizes to within scale / 2 of the original, and the row's
        // largest magnitude maps to +-127.
        let w = [0.5f32, -1.27, 0.0, 0.3, 2.0, -0.7];
        let (values, scales) = quantize_rows(&w, 3);
        for (r, row) in w.chunks(3).enumerate() {
            let max = row.iter().fold(0.0f32, |m, v| m.max(v.abs()));
            assert_eq!(scales[r], max / 127.0);
            let extreme = row.iter().position(|v| v.abs() == max).unwrap();
            assert_eq!(values[3 * r + extreme].unsigned_abs(), 127);
            for (i, v) in row.iter().enumerate() {
                let q = values[3 * r + i];
                assert!(q.unsigned_abs() <= 127);
                assert!((f32::from(q) * scales[r] - v).abs() <= scales[r] / 2.0 + 1e-7);
            }
        }
    }

    #[test]
    fn an_all_zero_row_gets_scale_one() {
        let (values, scales) = quantize_rows(&[0.0, 0.0], 2);
        assert_eq!(scales, [1.0]);
        assert_eq!(values, [0, 0]);
    }

    #[test]
    fn f32_bytes_are_little_endian() {
        // IEEE 754 binary32: 1.0 is 0x3F800000 (from memory).
        assert_eq!(f32_bytes(&[1.0]), [0x00, 0x00, 0x80, 0x3F]);
    }
}
