//! Help for editors and shells, generated from the definitions the tool itself uses: the JSON
//! Schema of plans and stations (from the types the files are read into), shell completions
//! and the man page (from the command-line definition). Nothing here is written by hand, so
//! none of it can fall behind the parser.

use super::*;
use clap::CommandFactory;

#[derive(clap::Args)]
pub(super) struct SchemaArgs {
    /// Which file's schema: plan or station.
    #[arg(value_parser = ["plan", "station"])]
    of: String,
}

#[derive(clap::Args)]
pub(super) struct CompletionsArgs {
    /// The shell: bash, zsh, fish, elvish or powershell.
    shell: clap_complete::Shell,
}

#[derive(clap::Args)]
pub(super) struct ManArgs {
    /// Write a page per command (meterproof.1, meterproof-run.1, ...) to this folder instead
    /// of the main page to standard output.
    #[arg(long, value_name = "DIR")]
    out: Option<PathBuf>,
}

/// `meterproof schema plan|station`: the JSON Schema on standard output.
pub(super) fn schema(args: &SchemaArgs) -> Result<i32, CliError> {
    let schema = match args.of.as_str() {
        "station" => crate::bench::station::station_schema(),
        _ => crate::plan::plan_schema(),
    };
    print_json(&schema);
    Ok(0)
}

/// `meterproof completions SHELL`: the completion script on standard output.
pub(super) fn completions(args: &CompletionsArgs) -> Result<i32, CliError> {
    let mut script = Vec::new();
    clap_complete::generate(args.shell, &mut Cli::command(), "meterproof", &mut script);
    out_part!("{}", String::from_utf8_lossy(&script));
    Ok(0)
}

/// `meterproof man`: the man page (roff) on standard output, or a page per command in a folder.
pub(super) fn man(args: &ManArgs) -> Result<i32, CliError> {
    let command = Cli::command();
    match &args.out {
        None => {
            let mut page = Vec::new();
            clap_mangen::Man::new(command)
                .render(&mut page)
                .map_err(|e| CliError::Run(format!("rendering the man page: {e}")))?;
            out_part!("{}", String::from_utf8_lossy(&page));
        }
        Some(dir) => {
            std::fs::create_dir_all(dir)
                .map_err(|e| CliError::Run(format!("{}: {e}", dir.display())))?;
            clap_mangen::generate_to(command, dir)
                .map_err(|e| CliError::Run(format!("{}: {e}", dir.display())))?;
            out!("man pages written to {}", dir.display());
        }
    }
    Ok(0)
}
