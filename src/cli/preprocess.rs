//! `lineside preprocess`: run one image through a model's serving pipeline and write the exact
//! input tensor the engine would get, so a training/serving preprocessing mismatch can be
//! seen and compared with the training pipeline's own tensor (e.g. in NumPy).
//!
//! It calls the same [`Pipeline::run_with_canvas`] as `serve` (the canvas is the resized image
//! before normalisation, for `--preview`); only the model's contract is read, no plan is built.

use std::path::PathBuf;

use anyhow::Context as _;

use super::{ConfigArg, Outcome};
use crate::config::Config;
use crate::model::InputType;
use crate::preprocess::npy;
use crate::served::{LoadOptions, Loaded};

/// Arguments of `lineside preprocess`.
#[derive(Debug, clap::Args)]
pub struct PreprocessArgs {
    /// Config file.
    #[command(flatten)]
    pub config: ConfigArg,
    /// The configured model whose preprocessing to run (optional when the config has one).
    #[arg(long, value_name = "NAME")]
    pub model: Option<String>,
    /// The image file, as a camera would post it.
    #[arg(value_name = "IMAGE")]
    pub image: PathBuf,
    /// Where to write the input tensor (NumPy .npy, shape [1, C, H, W] or [1, H, W, C], the
    /// model's input type).
    #[arg(long, value_name = "FILE.npy")]
    pub out: PathBuf,
    /// Also write the resized image before normalisation as a PNG.
    #[arg(long, value_name = "FILE.png")]
    pub preview: Option<PathBuf>,
}

/// Write the tensor (and preview) for one image.
///
/// # Errors
/// Config errors, an unknown model, a model whose contract fails, an unreadable or
/// undecodable image (the message says what was wrong), an unwritable output.
pub fn run(args: PreprocessArgs) -> anyhow::Result<Outcome> {
    let config = Config::load(args.config.config.as_deref(), &super::base_overrides()?)?;
    let mc = super::pick_model(&config, args.model.as_deref(), "--model")?;
    let opts = LoadOptions { limits: config.server.decode_limits(), ..LoadOptions::single() };
    let loaded = Loaded::load(mc, &opts)?;
    let (contract, pipeline) = (&loaded.model.contract, &loaded.pipeline);
    let bytes = std::fs::read(&args.image).with_context(|| format!("cannot read {}", args.image.display()))?;
    let prepared = pipeline.run_with_canvas(&bytes).with_context(|| format!("{}", args.image.display()))?;

    let shape = contract.input_shape(1);
    let type_name = match contract.input_type {
        InputType::Float32 => "float32",
        InputType::Uint8 => "uint8",
    };
    std::fs::write(&args.out, npy::encode(&shape, &prepared.tensor))
        .with_context(|| format!("cannot write {}", args.out.display()))?;
    if let Some(path) = &args.preview {
        let img =
            prepared.canvas.as_ref().and_then(|c| c.to_dynamic()).context("internal: no preview image was kept")?;
        img.save_with_format(path, image::ImageFormat::Png)
            .with_context(|| format!("cannot write the preview {}", path.display()))?;
    }
    let t = prepared.tensor.to_f32();
    let (lo, hi) = t.iter().fold((f32::INFINITY, f32::NEG_INFINITY), |(a, b), &v| (a.min(v), b.max(v)));
    let mean = t.iter().map(|&v| f64::from(v)).sum::<f64>() / t.len() as f64;
    let (sw, sh) = prepared.source_size;
    println!(
        "{}: {} {sw}x{sh} -> {} {shape:?} {type_name} {}, min {lo:.4} mean {mean:.4} max {hi:.4} \
         (decode {:.2} ms, preprocess {:.2} ms)",
        mc.name,
        args.image.display(),
        args.out.display(),
        contract.layout,
        crate::millis(prepared.decode),
        crate::millis(prepared.preprocess),
    );
    Ok(Outcome::Ok)
}
