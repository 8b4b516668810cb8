//! Writing results as a terminal table, JSON, JSON Lines or CSV.

use std::fs::File;
use std::io::{self, BufWriter, IsTerminal, Write};
use std::path::PathBuf;

use anyhow::{Context, Result};
use clap::{Args, ValueEnum};
use serde::Serialize;

#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, ValueEnum)]
pub enum Format {
    /// Aligned columns for people.
    #[default]
    Table,
    /// One JSON document.
    Json,
    /// One JSON object per line.
    Jsonl,
    /// Comma-separated values with a header row.
    Csv,
}

#[derive(Args, Clone, Debug, Default)]
pub struct OutputArgs {
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
    /// Write to this file instead of standard output.
    #[arg(long, value_name = "FILE")]
    pub output: Option<PathBuf>,
}

/// A result that can be shown in every format: serialised whole for JSON,
/// item by item for JSON Lines, and flattened into rows for tables and CSV.
pub trait Report {
    type Item: Serialize;
    /// The JSON document (usually the list of items, or an object around it).
    fn document(&self) -> Result<serde_json::Value>;
    fn items(&self) -> Vec<&Self::Item>;
    fn columns(&self) -> Vec<&'static str>;
    fn rows(&self) -> Vec<Vec<String>>;
    /// Lines printed above a table (summaries); not part of machine formats.
    fn preamble(&self) -> Vec<String> {
        Vec::new()
    }
}

fn open_sink(args: &OutputArgs) -> Result<Box<dyn Write>> {
    Ok(match &args.output {
        Some(path) => Box::new(BufWriter::new(
            File::create(path).with_context(|| format!("cannot create {}", path.display()))?,
        )),
        None => Box::new(BufWriter::new(io::stdout().lock())),
    })
}

pub fn emit<R: Report>(report: &R, args: &OutputArgs) -> Result<()> {
    let mut out = open_sink(args)?;
    match args.format {
        Format::Json => {
            serde_json::to_writer_pretty(&mut out, &report.document()?)?;
            writeln!(out)?;
        }
        Format::Jsonl => {
            for item in report.items() {
                serde_json::to_writer(&mut out, item)?;
                writeln!(out)?;
            }
        }
        Format::Csv => {
            let mut writer = csv::Writer::from_writer(out);
            writer.write_record(report.columns())?;
            for row in report.rows() {
                writer.write_record(row)?;
            }
            writer.flush()?;
            return Ok(());
        }
        Format::Table => {
            for line in report.preamble() {
                writeln!(out, "{line}")?;
            }
            // Escapes only where a person reads them: never into a file.
            let bold = args.output.is_none() && io::stdout().is_terminal();
            write_table(&mut out, &report.columns(), &report.rows(), bold)?;
        }
    }
    out.flush()?;
    Ok(())
}

fn write_table(
    out: &mut dyn Write,
    columns: &[&str],
    rows: &[Vec<String>],
    bold: bool,
) -> io::Result<()> {
    let mut widths: Vec<usize> = columns.iter().map(|c| c.chars().count()).collect();
    for row in rows {
        for (width, cell) in widths.iter_mut().zip(row) {
            *width = (*width).max(cell.chars().count());
        }
    }
    let line = |cells: Vec<&str>| {
        cells
            .iter()
            .zip(&widths)
            .map(|(cell, width)| format!("{cell:<width$}"))
            .collect::<Vec<_>>()
            .join("  ")
            .trim_end()
            .to_owned()
    };
    let header = line(columns.to_vec());
    if bold {
        writeln!(out, "\x1b[1m{header}\x1b[0m")?;
    } else {
        writeln!(out, "{header}")?;
    }
    for row in rows {
        writeln!(out, "{}", line(row.iter().map(String::as_str).collect()))?;
    }
    if rows.is_empty() {
        writeln!(out, "(none)")?;
    }
    Ok(())
}

pub fn opt(value: &Option<String>) -> String {
    value.clone().unwrap_or_default()
}

pub fn score(value: f32) -> String {
    format!("{value:.4}")
}
