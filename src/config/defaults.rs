//! Defaults, in one place (docs/configuration.md lists the same).

/// `[server] listen`.
pub const LISTEN: &str = "127.0.0.1:8080";
/// `[server] body_limit_bytes`: 16 MiB.
pub const BODY_LIMIT_BYTES: u64 = 16 * 1024 * 1024;
/// `[server] max_pixels`: 40 megapixels.
pub const MAX_PIXELS: u64 = 40_000_000;
/// `[server] max_decode_bytes`: 512 MiB, enough for a 40-megapixel 8-bit PNG or JPEG (an
/// RGB PNG's estimate is 9 bytes a pixel, RGBA 11, a colour JPEG's 12), not for 16-bit RGBA
/// (28) or RGB WebP (17) at that size.
pub const MAX_DECODE_BYTES: u64 = 512 * 1024 * 1024;
/// `[server] max_parts`: as many as the default backlog holds.
pub const MAX_PARTS: usize = 64;
/// `[server] max_part_bytes`: 8 MiB, a camera frame's file with room to spare.
pub const MAX_PART_BYTES: u64 = 8 * 1024 * 1024;
/// `[server] header_timeout_ms`.
pub const HEADER_TIMEOUT_MS: u64 = 5_000;
/// `[server] deadline_ms`.
pub const DEADLINE_MS: u64 = 2_000;
/// `[server] body_timeout_ms`.
pub const BODY_TIMEOUT_MS: u64 = 10_000;
/// `[server] stall_ms`.
pub const STALL_MS: u64 = 30_000;
/// `[server] ready_backlog`.
pub const READY_BACKLOG: f64 = 0.9;
/// `[server] max_connections`: connections open at once (a line's cameras and PCs need a
/// few dozen; the rest is room for clients that reconnect).
pub const MAX_CONNECTIONS: usize = 1024;
/// `[server] max_header_bytes`: a request's line and headers together.
pub const MAX_HEADER_BYTES: usize = 16 * 1024;
/// `[server] drain_ms`.
pub const DRAIN_MS: u64 = 10_000;
/// `[server] decode_backlog`.
pub const DECODE_BACKLOG: usize = 256;
/// `[server] decode_inline_pixels`: 128 x 128. A 96x96 PNG decodes and preprocesses in
/// about 0.08 ms here (a 128x128 one about twice that), less than the CPU that handing
/// it to a pool thread and back cost per request in the serving bench; larger frames go
/// to the pool, so that a slow decode never holds the HTTP thread.
pub const DECODE_INLINE_PIXELS: u64 = 128 * 128;
/// `[server] http_threads`.
pub const HTTP_THREADS: usize = 1;
/// `[models.batching] batch_cap`.
pub const BATCH_CAP: usize = 8;
/// `[models.batching] gather_us`.
pub const GATHER_US: u64 = 2_000;
/// `[models.batching] backlog`.
pub const BACKLOG: usize = 64;
/// `[models.batching] lane_threads`.
pub const LANE_THREADS: usize = 1;
/// `[models.selftest] tolerance`.
pub const SELFTEST_TOLERANCE: f32 = 1e-4;
/// `[models.preprocess] min_side`.
pub const MIN_SIDE: u32 = 8;
/// ImageNet channel means in RGB order (common practice; `normalize = "imagenet"`).
pub const IMAGENET_MEAN: [f32; 3] = [0.485, 0.456, 0.406];
/// ImageNet channel standard deviations in RGB order (common practice).
pub const IMAGENET_STD: [f32; 3] = [0.229, 0.224, 0.225];
/// `[server] session_minutes`: a page session (after logging in with the admin token) lasts
/// an hour; a person reviewing frames logs in again after that.
pub const SESSION_MINUTES: u64 = 60;
/// `[models.retain] max_frames`.
pub const RETAIN_MAX_FRAMES: u64 = 10_000;
/// `[models.retain] max_bytes` (2 GB).
pub const RETAIN_MAX_BYTES: u64 = 2_000_000_000;
/// `[models.retain] queue`: frames waiting for the writer thread.
pub const RETAIN_QUEUE: u64 = 64;
