//! `lineside retained export`: a model's confirmed retained frames as one folder per class.

use std::path::PathBuf;

use super::{ConfigArg, Outcome};
use crate::config::Config;

/// Arguments of `lineside retained`.
#[derive(Debug, clap::Args)]
pub struct RetainedArgs {
    /// What to do with the retained frames.
    #[command(subcommand)]
    pub action: RetainedAction,
}

/// `lineside retained` actions.
#[derive(Debug, clap::Subcommand)]
pub enum RetainedAction {
    /// Copy the frames a person has confirmed (a `confirmed` label in the sidecar) into
    /// OUT/<label>/, the layout `lineside evaluate` reads; print what was exported and how many
    /// frames still wait for a person.
    Export(ExportArgs),
}

/// Arguments of `lineside retained export`.
#[derive(Debug, clap::Args)]
pub struct ExportArgs {
    /// Config file.
    #[command(flatten)]
    pub config: ConfigArg,
    /// The model whose retain folder to read (needed when the config serves several).
    #[arg(long, value_name = "NAME")]
    pub model: Option<String>,
    /// Where the class folders go (created if missing).
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
    /// Print the summary as JSON.
    #[arg(long)]
    pub json: bool,
}

/// Run `lineside retained ...`.
///
/// # Errors
/// Config errors, a model without `[models.retain]`, a folder that cannot be read or written.
pub fn run(args: RetainedArgs) -> anyhow::Result<Outcome> {
    let RetainedAction::Export(args) = args.action;
    let config = Config::load(args.config.config.as_deref(), &super::base_overrides()?)?;
    let mc = super::pick_model(&config, args.model.as_deref(), "--model")?;
    let Some(retain) = &mc.retain else {
        anyhow::bail!("model {:?} in {} has no [models.retain] table: nothing is retained", mc.name, config.origin);
    };
    // The model's labels, so that a mistyped confirmation is not exported as a new class.
    let labels = match &mc.labels {
        Some(src) => Some(crate::model::labels::parse(&src.read()?, &src.display()).map_err(anyhow::Error::msg)?),
        None => None,
    };
    let summary =
        crate::retain::export::export(&retain.dir, &args.out, labels.as_deref()).map_err(anyhow::Error::msg)?;
    if args.json {
        println!("{}", serde_json::to_string_pretty(&summary)?);
        return Ok(Outcome::Ok);
    }
    println!(
        "exported {} confirmed frame(s) of model {:?} from {} to {}",
        summary.total(),
        mc.name,
        retain.dir.display(),
        args.out.display()
    );
    for (label, n) in &summary.exported {
        println!("  {label:<20} {n}");
    }
    println!("  ({} corrected: the person's label differs from the model's answer)", summary.corrected);
    println!("{} frame(s) wait for a person to confirm their label", summary.unconfirmed);
    if summary.bad_label > 0 {
        println!("{} confirmed with a label that cannot be a folder name (skipped)", summary.bad_label);
    }
    for (label, n) in &summary.unknown_label {
        println!("{n} confirmed as {label:?}, which is not one of the model's labels (skipped: correct the sidecar)");
    }
    if summary.unreadable > 0 {
        println!("{} sidecar(s) unreadable or without their frame (skipped)", summary.unreadable);
    }
    Ok(Outcome::Ok)
}
