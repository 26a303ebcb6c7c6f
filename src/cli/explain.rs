//! `meterproof explain`: one check's whole computation, redone on paper from the archive.

use super::CliError;
use super::archive_cmds::open_to_read;

#[derive(clap::Args)]
pub(super) struct ExplainArgs {
    /// The run id.
    run: String,
    /// The unit's serial number.
    serial: String,
    /// The step: its id, or its number counted from 1.
    step: String,
    /// The quantity checked (current, voltage, active_power, ...).
    quantity: String,
    #[arg(long)]
    archive: crate::archive::Location,
    /// The channel, where the unit has several.
    #[arg(long)]
    channel: Option<String>,
}

/// Prints the computation of one check of one unit, from its sealed record.
pub(super) fn explain(args: &ExplainArgs) -> Result<i32, CliError> {
    let archive = open_to_read(&args.archive)?;
    let records = archive
        .unit_records(&args.run)
        .map_err(|e| CliError::Run(e.to_string()))?;
    let record = records
        .iter()
        .find(|r| r.serial == args.serial)
        .ok_or_else(|| {
            CliError::Usage(format!(
                "run {} has no unit {} (units: {})",
                args.run,
                args.serial,
                records
                    .iter()
                    .map(|r| r.serial.as_str())
                    .collect::<Vec<_>>()
                    .join(", ")
            ))
        })?;
    let text = crate::report::explain::explain(
        record,
        &args.step,
        &args.quantity,
        args.channel.as_deref(),
    )
    .map_err(|e| CliError::Usage(e.to_string()))?;
    out_part!("{}", super::terminal_safe_lines(&text));
    Ok(0)
}
