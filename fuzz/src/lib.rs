//! lineside's engine-free input parsers, compiled straight from `../src` for the fuzz targets:
//! the preprocessing (sniff, header, decode, ROI, channels, resize, normalise, `.npy`), the
//! multipart parser and the classify request's query and headers. The module tree mirrors
//! lineside's where those files look (`crate::model::...`), so the same source compiles
//! here and there; a file on this list that starts to use the engine breaks this build (in
//! CI), which is the point.

#![allow(dead_code, unused_imports)]

#[path = "../../src/model/contract.rs"]
pub mod contract;
#[path = "../../src/http/multipart.rs"]
pub mod multipart;
#[path = "../../src/http/request.rs"]
pub mod request;

/// `src/model/contract.rs` as `crate::model`.
pub mod model {
    pub use super::contract::*;
}

#[path = "../../src/preprocess/mod.rs"]
pub mod preprocess;

/// The request parsers of `src/http`.
pub mod http {
    pub use super::{multipart, request};
}
