//! The `.npy` writer (`lineside preprocess --out`), read back by a reader written here from
//! NumPy's format description (numpy.lib.format: magic `\x93NUMPY`, version, little-endian
//! header length, a dict literal padded with spaces to a 64-byte boundary and ended by `\n`,
//! then C-order data).
//!
//! Properties: no panic for any shape whose product is the data's length; the file reads
//! back to the same shape, element type and values.
#![no_main]

use arbitrary::{Result, Unstructured};
use libfuzzer_sys::fuzz_target;
use lineside_fuzz::model::Tensor;
use lineside_fuzz::preprocess::npy;

fn input(u: &mut Unstructured<'_>) -> Result<(Vec<usize>, Tensor)> {
    // Dimensions of 0 to 3 elements (4096 dims at most: a header far past u16::MAX bytes).
    let rank = u.int_in_range(0..=4096)?;
    let mut shape = Vec::with_capacity(rank);
    for _ in 0..rank {
        shape.push(u.int_in_range(0..=3)?);
    }
    // At most 65536 elements (a longer shape's product is skipped, not overflowed).
    let Some(n) = shape.iter().try_fold(1usize, |n, &d| n.checked_mul(d)).filter(|&n| n <= 1 << 16) else {
        return Err(arbitrary::Error::IncorrectFormat);
    };
    let tensor = if u.arbitrary()? {
        Tensor::U8((0..n).map(|_| u.arbitrary()).collect::<Result<_>>()?)
    } else {
        Tensor::F32((0..n).map(|_| u.arbitrary()).collect::<Result<_>>()?)
    };
    Ok((shape, tensor))
}

/// (shape, descr, data offset) from an .npy file.
fn read(b: &[u8]) -> (Vec<usize>, String, usize) {
    assert_eq!(&b[..6], b"\x93NUMPY", "magic");
    let (len, start) = match (b[6], b[7]) {
        (1, 0) => (usize::from(u16::from_le_bytes([b[8], b[9]])), 10),
        (2, 0) => (u32::from_le_bytes([b[8], b[9], b[10], b[11]]) as usize, 12),
        v => panic!("version {v:?}"),
    };
    let data = start + len;
    assert_eq!(data % 64, 0, "data not on a 64-byte boundary");
    let header = std::str::from_utf8(&b[start..data]).expect("ASCII header");
    assert!(header.ends_with('\n'));
    let descr = header.split("'descr': '").nth(1).and_then(|s| s.split('\'').next()).expect("descr").to_string();
    assert!(header.contains("'fortran_order': False"));
    let dims = header.split("'shape': (").nth(1).and_then(|s| s.split(')').next()).expect("shape");
    let shape = dims.split(',').map(str::trim).filter(|d| !d.is_empty()).map(|d| d.parse().expect("dim")).collect();
    (shape, descr, data)
}

fuzz_target!(|data: &[u8]| {
    let Ok((shape, tensor)) = input(&mut Unstructured::new(data)) else { return };
    let bytes = npy::encode(&shape, &tensor);
    let (read_shape, descr, offset) = read(&bytes);
    assert_eq!(read_shape, shape);
    let body = &bytes[offset..];
    match &tensor {
        Tensor::U8(v) => {
            assert_eq!(descr, "|u1");
            assert_eq!(body, v.as_slice());
        }
        Tensor::F32(v) => {
            assert_eq!(descr, "<f4");
            let back: Vec<u32> = body.chunks_exact(4).map(|c| u32::from_le_bytes([c[0], c[1], c[2], c[3]])).collect();
            assert_eq!(back, v.iter().map(|x| x.to_bits()).collect::<Vec<_>>());
        }
    }
});
