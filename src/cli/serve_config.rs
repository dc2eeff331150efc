//! `candor serve --config FILE` and `--print-config`: settings from a TOML file, below flags and
//! environment variables, above defaults.
//!
//! The file's keys are the long flag names in kebab-case (`rescan-secs = 5`,
//! `admin-listen = "127.0.0.1:50552"`, `no-file-events = true`). A value from the file is
//! handed to the same parser as the flag, as `--key=VALUE`, but only for settings whose value
//! would otherwise be clap's default: clap's `value_source` says which those are.

use super::serve::ServeArgs;
use anyhow::Context;
use clap::parser::ValueSource;
use clap::{ArgAction, ArgMatches, CommandFactory, FromArgMatches};
use std::collections::BTreeSet;
use std::ffi::OsString;
use std::fmt::Write as _;
use std::path::Path;

/// Flags that are not settings: they cannot appear in the file and are not printed.
const NOT_SETTINGS: [&str; 3] = ["config", "print-config", "help"];

/// Settings whose value is a secret: `--print-config` never prints them.
const SECRETS: [&str; 1] = ["admin-token"];

/// The name of the subcommand whose arguments the file sets.
const SUBCOMMAND: &str = "serve";

/// Serve arguments with the configuration file applied, and where each value came from.
pub(super) struct Resolved {
    /// The effective arguments.
    pub args: ServeArgs,
    /// The parsed `serve` arguments (for `--print-config`).
    matches: ArgMatches,
    /// Keys whose value came from the file.
    from_file: BTreeSet<String>,
}

/// Parses the process arguments again and applies `args.config` to every setting still at its
/// default.
///
/// # Errors
/// The file cannot be read, is not TOML, names an unknown key, holds a value of the wrong kind,
/// or holds a value the flag's own parser refuses; every message names the file.
pub(super) fn resolve(args: ServeArgs) -> anyhow::Result<Resolved> {
    let argv: Vec<OsString> = std::env::args_os().collect();
    let command = super::Cli::command();
    let first = command
        .clone()
        .try_get_matches_from(&argv)
        .context("parsing the command line again")?;
    let Some(path) = args.config.clone() else {
        let matches = serve_matches(&first)?.clone();
        return Ok(Resolved {
            args,
            matches,
            from_file: BTreeSet::new(),
        });
    };
    let serve = serve_matches(&first)?;
    let (extra, from_file) = file_arguments(&path, &command, serve)?;
    let mut all = argv;
    all.extend(extra);
    let second = command
        .try_get_matches_from(&all)
        .map_err(|e| refused(&path, &e))?;
    let matches = serve_matches(&second)?.clone();
    let args = ServeArgs::from_arg_matches(&matches).map_err(|e| refused(&path, &e))?;
    Ok(Resolved {
        args,
        matches,
        from_file,
    })
}

/// A clap error caused by a value from the file, as one line naming the file.
fn refused(path: &Path, e: &clap::Error) -> anyhow::Error {
    let text = e.render().to_string();
    let first = text.lines().next().unwrap_or_default();
    anyhow::anyhow!(
        "config file {}: {}",
        path.display(),
        first.trim_start_matches("error: ")
    )
}

fn serve_matches(m: &ArgMatches) -> anyhow::Result<&ArgMatches> {
    m.subcommand_matches(SUBCOMMAND)
        .context("the command line names no `serve` subcommand")
}

/// The `--key=VALUE` arguments the file contributes, and the keys it set.
fn file_arguments(
    path: &Path,
    command: &clap::Command,
    matches: &ArgMatches,
) -> anyhow::Result<(Vec<OsString>, BTreeSet<String>)> {
    let where_ = || format!("config file {}", path.display());
    let text =
        std::fs::read_to_string(path).with_context(|| format!("{}: cannot read", where_()))?;
    let table: toml::Table = text
        .parse()
        .with_context(|| format!("{}: not valid TOML", where_()))?;
    let serve = command
        .find_subcommand(SUBCOMMAND)
        .context("no serve subcommand")?;
    let mut extra = Vec::new();
    let mut from_file = BTreeSet::new();
    for (key, value) in &table {
        let arg = serve
            .get_arguments()
            .find(|a| a.get_long() == Some(key.as_str()))
            .filter(|_| !NOT_SETTINGS.contains(&key.as_str()));
        let Some(arg) = arg else {
            let hint = if key.contains('_') {
                format!(" (keys are kebab-case: {:?})", key.replace('_', "-"))
            } else {
                String::new()
            };
            anyhow::bail!(
                "{}: unknown key {key:?}{hint}; keys are the long flag names of `candor serve`",
                where_()
            );
        };
        let id = arg.get_id().as_str();
        if matches!(
            matches.value_source(id),
            Some(ValueSource::CommandLine | ValueSource::EnvVariable)
        ) {
            continue;
        }
        let is_switch = matches!(arg.get_action(), ArgAction::SetTrue);
        let text = match (value, is_switch) {
            (toml::Value::Boolean(b), true) => {
                if *b {
                    extra.push(OsString::from(format!("--{key}")));
                    from_file.insert(key.clone());
                }
                continue;
            }
            (_, true) => anyhow::bail!("{}: {key} must be true or false", where_()),
            (toml::Value::String(s), false) => s.clone(),
            (toml::Value::Integer(i), false) => i.to_string(),
            (toml::Value::Float(x), false) => x.to_string(),
            (other, false) => anyhow::bail!(
                "{}: {key} must be a string or a number, got a {}",
                where_(),
                other.type_str()
            ),
        };
        extra.push(OsString::from(format!("--{key}={text}")));
        from_file.insert(key.clone());
    }
    Ok((extra, from_file))
}

/// The effective configuration as TOML that `--config` accepts back: one line per setting with
/// where its value came from; unset settings and secrets as comments.
pub(super) fn print(resolved: &Resolved) -> String {
    let mut out = String::from(
        "# candor serve: effective configuration (precedence: flag > env > file > default)\n",
    );
    let command = super::Cli::command();
    let Some(serve) = command.find_subcommand(SUBCOMMAND) else {
        return out;
    };
    let m = &resolved.matches;
    for arg in serve.get_arguments() {
        let Some(key) = arg.get_long() else { continue };
        if NOT_SETTINGS.contains(&key) {
            continue;
        }
        let id = arg.get_id().as_str();
        let source = if resolved.from_file.contains(key) {
            "file"
        } else {
            match m.value_source(id) {
                Some(ValueSource::CommandLine) => "flag",
                Some(ValueSource::EnvVariable) => "env",
                Some(ValueSource::DefaultValue) => "default",
                _ => "",
            }
        };
        let value = if matches!(arg.get_action(), ArgAction::SetTrue) {
            Some(toml::Value::Boolean(m.get_flag(id)))
        } else {
            m.get_raw(id)
                .and_then(|mut v| v.next())
                .map(|v| typed(&v.to_string_lossy()))
        };
        let _ = match value {
            None => writeln!(out, "# {key} is not set"),
            Some(_) if SECRETS.contains(&key) => {
                writeln!(
                    out,
                    "# {key} = \"<redacted>\"  # set ({source}); never printed"
                )
            }
            Some(v) => writeln!(out, "{key} = {v}  # {source}"),
        };
    }
    out
}

/// A raw value as a TOML integer or float when it reads back to the same text, else a string.
fn typed(s: &str) -> toml::Value {
    if let Ok(i) = s.parse::<i64>() {
        if i.to_string() == s {
            return toml::Value::Integer(i);
        }
    }
    if let Ok(x) = s.parse::<f64>() {
        if x.is_finite() && x.to_string() == s {
            return toml::Value::Float(x);
        }
    }
    toml::Value::String(s.to_owned())
}

#[cfg(test)]
mod tests {
    use super::typed;

    #[test]
    fn numbers_are_typed_only_when_they_read_back_to_the_same_text() {
        assert_eq!(typed("5"), toml::Value::Integer(5));
        assert_eq!(typed("0.25"), toml::Value::Float(0.25));
        assert_eq!(typed("007"), toml::Value::String("007".into()));
        assert_eq!(
            typed("127.0.0.1:1"),
            toml::Value::String("127.0.0.1:1".into())
        );
    }
}
