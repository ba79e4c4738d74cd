//! One codec for the run folder's CSV tables: a row type lists its columns once (name, how a
//! row writes it, how it is read back), and every table is written and read through
//! [`write_table`] and [`read_table`]. Reading goes by header name, never by position, and a
//! missing column or a cell that is not a number is an error naming the file, line and
//! column.
//!
//! Yields are kg/ha in memory; a yield column is written in the trial's output unit and read
//! back to kg/ha here, the one place the unit is applied to a table.

use super::write_atomic;
use anyhow::{anyhow, bail, Context, Result};
use plotsieve_stages::crop::YieldUnit;
use plotsieve_stages::util::fmt;
use std::path::Path;

/// One column of a table of `T`.
pub struct Col<T> {
    /// The header name (yield columns carry the output unit, e.g. `yield_mean_t_ha`).
    pub name: String,
    cell: Cell<T>,
}

enum Cell<T> {
    /// Written and read as text.
    Text {
        write: fn(&T) -> String,
        /// Set the row's field from a cell; `Err` says what was expected.
        read: fn(&mut T, &str) -> Result<(), String>,
    },
    /// A yield (or a yield's SD or interval): kg/ha in the row, the output unit in the file.
    Yield {
        get: fn(&T) -> f64,
        set: fn(&mut T, f64),
        decimals: usize,
    },
}

/// A column with its name, writer and reader.
pub fn col<T>(
    name: impl Into<String>,
    write: fn(&T) -> String,
    read: fn(&mut T, &str) -> Result<(), String>,
) -> Col<T> {
    Col {
        name: name.into(),
        cell: Cell::Text { write, read },
    }
}

/// A yield column: the row holds kg/ha, the file the output unit with `decimals` decimals.
pub fn yield_col<T>(
    name: impl Into<String>,
    get: fn(&T) -> f64,
    set: fn(&mut T, f64),
    decimals: usize,
) -> Col<T> {
    Col {
        name: name.into(),
        cell: Cell::Yield { get, set, decimals },
    }
}

impl<T> Col<T> {
    /// The cell of a row as written.
    pub fn write(&self, r: &T, u: &YieldUnit) -> String {
        match &self.cell {
            Cell::Text { write, .. } => write(r),
            Cell::Yield { get, decimals, .. } => fmt(u.to_unit(get(r)), *decimals),
        }
    }
    fn read(&self, r: &mut T, cell: &str, u: &YieldUnit) -> Result<(), String> {
        match &self.cell {
            Cell::Text { read, .. } => read(r, cell),
            Cell::Yield { set, .. } => {
                set(r, u.to_kg_ha(number(cell)?));
                Ok(())
            }
        }
    }
}

/// A cell holding a number: empty is NaN (how `util::fmt` writes NaN).
pub fn number(cell: &str) -> Result<f64, String> {
    if cell.is_empty() {
        return Ok(f64::NAN);
    }
    cell.parse()
        .map_err(|_| format!("expected a number, found {cell:?}"))
}

/// A cell holding a count.
pub fn count<N: std::str::FromStr>(cell: &str) -> Result<N, String> {
    cell.parse()
        .map_err(|_| format!("expected a whole number, found {cell:?}"))
}

/// A row type of a run-folder table.
pub trait Table: Default {
    /// The columns in file order; `unit` is the output unit's suffix (`t_ha`, `bu_ac`).
    fn columns(unit: &str) -> Vec<Col<Self>>;
}

/// The table as CSV bytes: header, then one record per row.
pub fn table_bytes<T: Table>(rows: &[T], u: &YieldUnit) -> Result<Vec<u8>> {
    let cols = T::columns(u.suffix());
    let mut w = csv::Writer::from_writer(Vec::new());
    w.write_record(cols.iter().map(|c| c.name.as_str()))?;
    for r in rows {
        w.write_record(cols.iter().map(|c| c.write(r, u)))?;
    }
    w.into_inner().map_err(|e| anyhow!("{e}"))
}

/// Write the table atomically, yields in the output unit.
pub fn write_table<T: Table>(path: &Path, rows: &[T], u: &YieldUnit) -> Result<()> {
    write_atomic(path, &table_bytes(rows, u)?)
}

/// Read a table back by header name, yields to kg/ha. A missing file says `hint` (what to
/// run); extra columns are ignored.
pub fn read_table<T: Table>(path: &Path, u: &YieldUnit, hint: &str) -> Result<Vec<T>> {
    read_columns_of(path, u, hint, None)
}

fn read_columns_of<T: Table>(
    path: &Path,
    u: &YieldUnit,
    hint: &str,
    only: Option<&[&str]>,
) -> Result<Vec<T>> {
    let mut out = Vec::new();
    for_each_row(path, u, hint, only, |row| {
        out.push(row);
        Ok(())
    })?;
    Ok(out)
}

/// Each row of a table in turn (only the named columns, when given), as [`read_table`]
/// reads them, without holding the table: for a reader that folds a long table.
pub fn for_each_row<T: Table>(
    path: &Path,
    u: &YieldUnit,
    hint: &str,
    only: Option<&[&str]>,
    mut f: impl FnMut(T) -> Result<()>,
) -> Result<()> {
    let unit = u.suffix();
    let mut rdr = csv::Reader::from_path(path)
        .with_context(|| format!("{} is missing: {hint}", path.display()))?;
    let header = rdr
        .headers()
        .with_context(|| format!("reading {}", path.display()))?
        .clone();
    let mut cols = T::columns(unit);
    if let Some(names) = only {
        cols.retain(|c| names.contains(&c.name.as_str()));
    }
    let mut idx = Vec::with_capacity(cols.len());
    for c in &cols {
        match header.iter().position(|h| h == c.name) {
            Some(i) => idx.push(i),
            None => bail!(
                "{}: no column {} (found: {}); {hint}",
                path.display(),
                c.name,
                header.iter().collect::<Vec<_>>().join(", ")
            ),
        }
    }
    let mut rec = csv::StringRecord::new();
    while rdr
        .read_record(&mut rec)
        .with_context(|| format!("reading {}", path.display()))?
    {
        let line = rec.position().map(|p| p.line()).unwrap_or(0);
        let mut row = T::default();
        for (c, &i) in cols.iter().zip(&idx) {
            c.read(&mut row, rec.get(i).unwrap_or(""), u)
                .map_err(|e| anyhow!("{}, line {line}, column {}: {e}", path.display(), c.name))?;
        }
        f(row)?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[derive(Default, Debug, PartialEq)]
    struct Pair {
        name: String,
        value: f64,
    }

    impl Table for Pair {
        fn columns(unit: &str) -> Vec<Col<Self>> {
            vec![
                col(
                    "name",
                    |r| r.name.clone(),
                    |r, v| Ok(r.name = v.to_string()),
                ),
                yield_col(format!("value_{unit}"), |r| r.value, |r, x| r.value = x, 2),
            ]
        }
    }

    #[test]
    fn tables_round_trip_by_name_and_name_what_is_wrong() {
        let dir = std::env::temp_dir().join(format!("plotsieve-io-{}", std::process::id()));
        let p = dir.join("t.csv");
        use plotsieve_stages::crop::{crop_table, OutputUnit};
        let corn = crop_table()["corn"].clone();
        let t_ha = YieldUnit::new(OutputUnit::THa, &corn);
        let bu_ac = YieldUnit::new(OutputUnit::BuAc, &corn);
        // kg/ha in the row, t/ha in the file.
        let rows = vec![
            Pair {
                name: "a".into(),
                value: 1500.0,
            },
            Pair {
                name: "b, c".into(),
                value: f64::NAN,
            },
        ];
        write_table(&p, &rows, &t_ha).unwrap();
        let text = std::fs::read_to_string(&p).unwrap();
        assert_eq!(text, "name,value_t_ha\na,1.50\n\"b, c\",\n");
        let back: Vec<Pair> = read_table(&p, &t_ha, "run it").unwrap();
        assert_eq!(back[0], rows[0]);
        assert!(back[1].value.is_nan());
        // Columns in another order, and one extra: read by name.
        std::fs::write(&p, "extra,value_t_ha,name\nx,2.25,z\n").unwrap();
        let back: Vec<Pair> = read_table(&p, &t_ha, "run it").unwrap();
        assert_eq!(
            back,
            vec![Pair {
                name: "z".into(),
                value: 2250.0
            }]
        );
        // Another unit's table, and a bad cell.
        let e = read_table::<Pair>(&p, &bu_ac, "rerun stage adjust")
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("no column value_bu_ac") && e.ends_with("rerun stage adjust"),
            "{e}"
        );
        std::fs::write(&p, "name,value_t_ha\na,lots\n").unwrap();
        let e = read_table::<Pair>(&p, &t_ha, "").unwrap_err().to_string();
        assert!(
            e.ends_with("line 2, column value_t_ha: expected a number, found \"lots\""),
            "{e}"
        );
        // Only the named columns: a bad cell elsewhere is not read, the field keeps its
        // default; a named column the file lacks is still an error.
        let read_only = |u: &YieldUnit, names: &[&str]| {
            let mut v: Vec<Pair> = Vec::new();
            for_each_row(&p, u, "hint", Some(names), |r| {
                v.push(r);
                Ok(())
            })
            .map(|_| v)
        };
        let only = read_only(&t_ha, &["name"]).unwrap();
        assert_eq!(
            only,
            vec![Pair {
                name: "a".into(),
                value: 0.0
            }]
        );
        let e = read_only(&bu_ac, &["value_bu_ac"]).unwrap_err().to_string();
        assert!(e.contains("no column value_bu_ac"), "{e}");
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
