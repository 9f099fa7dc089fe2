//! NumPy's `.npy` format (version 1.0), for `lineside preprocess --out tensor.npy`.
//!
//! Layout, as NumPy's format documentation specifies it: the magic `\x93NUMPY`, the version
//! bytes 1 and 0, a little-endian u16 header length, then a Python dict literal with `descr`,
//! `fortran_order` and `shape`, padded with spaces and ended by `\n` so that the data starts
//! on a 64-byte boundary; then the C-order data.

/// The element types lineside writes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Dtype {
    /// Little-endian float32 (`<f4`).
    F32,
    /// Unsigned bytes (`|u1`).
    U8,
}

/// Encode `values` with `shape` as `.npy` bytes. Values are converted to `dtype` (for `U8`,
/// rounded and clamped to 0..255).
///
/// # Panics
/// Never for a shape whose product is `values.len()`; a mismatch is a caller bug and asserted.
pub fn encode(shape: &[usize], values: &[f32], dtype: Dtype) -> Vec<u8> {
    assert_eq!(shape.iter().product::<usize>(), values.len(), "npy: shape does not match the data");
    let descr = match dtype {
        Dtype::F32 => "<f4",
        Dtype::U8 => "|u1",
    };
    let dims: Vec<String> = shape.iter().map(usize::to_string).collect();
    // A one-element tuple needs its trailing comma in Python syntax.
    let tuple = if dims.len() == 1 { format!("({},)", dims[0]) } else { format!("({})", dims.join(", ")) };
    let mut header = format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': {tuple}, }}");
    // magic (6) + version (2) + length (2) + header + '\n' is a multiple of 64.
    let unpadded = 10 + header.len() + 1;
    header.push_str(&" ".repeat((64 - unpadded % 64) % 64));
    header.push('\n');
    let mut out = Vec::with_capacity(10 + header.len() + values.len() * 4);
    out.extend_from_slice(b"\x93NUMPY\x01\x00");
    // The header of a 4-d shape is far below u16::MAX.
    out.extend_from_slice(&(header.len() as u16).to_le_bytes());
    out.extend_from_slice(header.as_bytes());
    match dtype {
        Dtype::F32 => values.iter().for_each(|v| out.extend_from_slice(&v.to_le_bytes())),
        Dtype::U8 => out.extend(values.iter().map(|v| v.round().clamp(0.0, 255.0) as u8)),
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn header_is_aligned_and_readable() {
        let b = encode(&[1, 3, 2, 2], &[0.5; 12], Dtype::F32);
        assert_eq!(&b[..8], b"\x93NUMPY\x01\x00");
        let len = usize::from(u16::from_le_bytes([b[8], b[9]]));
        assert_eq!((10 + len) % 64, 0);
        let header = std::str::from_utf8(&b[10..10 + len]).unwrap();
        assert!(header.starts_with("{'descr': '<f4', 'fortran_order': False, 'shape': (1, 3, 2, 2), }"), "{header}");
        assert!(header.ends_with('\n'));
        assert_eq!(b.len(), 10 + len + 12 * 4);
        assert_eq!(&b[10 + len..10 + len + 4], &0.5f32.to_le_bytes());
        let u = encode(&[2], &[254.6, -3.0], Dtype::U8);
        assert_eq!(&u[u.len() - 2..], &[255, 0]);
    }
}
