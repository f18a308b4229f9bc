//! `migration.matrix_csv`: a migration matrix sent as CSV text.
//!
//! One row of the matrix per line, fields separated by commas, optional spaces around fields,
//! fields optionally in double quotes (`""` inside quotes is a quote). Blank lines are
//! skipped. An optional first line of deme ids is a header: it is recognised when any of its
//! fields is not a number, or when it equals the deme ids; it must then list the job's deme
//! ids in the job's order (the matrix is never reordered). `NaN`, `inf` and `-inf` parse as
//! non-finite numbers, so that they are reported as such by the common matrix checks.

/// The cells of a CSV matrix, with where each row came from.
#[derive(Debug, Clone, PartialEq)]
pub struct CsvMatrix {
    /// Cells row by row; `None` where a cell is not a number (already reported).
    pub rows: Vec<Vec<Option<f64>>>,
    /// The 1-based line of the text each row came from.
    pub lines: Vec<usize>,
}

/// Splits one line into trimmed, unquoted fields, or says why it cannot.
fn fields(line: &str) -> Result<Vec<String>, String> {
    let mut out = Vec::new();
    let mut chars = line.chars().peekable();
    loop {
        while chars.peek().is_some_and(|c| *c == ' ' || *c == '\t') {
            chars.next();
        }
        let mut field = String::new();
        if chars.peek() == Some(&'"') {
            chars.next();
            loop {
                match chars.next() {
                    Some('"') if chars.peek() == Some(&'"') => {
                        chars.next();
                        field.push('"');
                    }
                    Some('"') => break,
                    Some(c) => field.push(c),
                    None => return Err("a quoted field is not closed".to_owned()),
                }
            }
            while chars.peek().is_some_and(|c| *c == ' ' || *c == '\t') {
                chars.next();
            }
            match chars.next() {
                None => {
                    out.push(field);
                    return Ok(out);
                }
                Some(',') => out.push(field),
                Some(_) => return Err("text after a closing quote".to_owned()),
            }
        } else {
            loop {
                match chars.next() {
                    None => {
                        out.push(field.trim().to_owned());
                        return Ok(out);
                    }
                    Some(',') => break,
                    Some(c) => field.push(c),
                }
            }
            out.push(field.trim().to_owned());
        }
    }
}

/// A cell as a number: Rust's `f64` grammar (decimal, exponent, `NaN`, `inf`, `infinity`,
/// any case, optional sign).
fn number(cell: &str) -> Option<f64> {
    cell.parse::<f64>().ok()
}

/// Parses `text` for a job whose demes are `ids` (`None` when the demes could not be read:
/// a header is then skipped unchecked). Problems are returned as details naming the line and
/// field; cells that are not numbers come back as `None`.
pub fn parse(text: &str, ids: Option<&[String]>) -> (CsvMatrix, Vec<String>) {
    let mut details = Vec::new();
    let mut lines: Vec<(usize, Vec<String>)> = Vec::new();
    for (n, line) in text.lines().enumerate() {
        if line.trim().is_empty() {
            continue;
        }
        match fields(line) {
            Ok(f) => lines.push((n + 1, f)),
            Err(why) => details.push(format!("line {}: {why}", n + 1)),
        }
    }
    let is_header = lines.first().is_some_and(|(_, first)| {
        first.iter().any(|c| number(c).is_none()) || ids.is_some_and(|ids| first.as_slice() == ids)
    });
    let mut rows = Vec::new();
    let mut row_lines = Vec::new();
    for (k, (line, cells)) in lines.into_iter().enumerate() {
        if k == 0 && is_header {
            if let Some(ids) = ids.filter(|ids| cells.as_slice() != *ids) {
                details.push(format!(
                    "line {line}: the header row must list the deme ids in the order of \
                     population.demes ({}), but it lists {}",
                    ids.join(", "),
                    cells.join(", ")
                ));
            }
            continue;
        }
        let row = cells
            .iter()
            .enumerate()
            .map(|(f, cell)| {
                let v = number(cell);
                if v.is_none() {
                    if cell.is_empty() {
                        details.push(format!("line {line}, field {}: the cell is empty", f + 1));
                    } else {
                        details.push(format!(
                            "line {line}, field {}: `{cell}` is not a number",
                            f + 1
                        ));
                    }
                }
                v
            })
            .collect();
        rows.push(row);
        row_lines.push(line);
    }
    if rows.is_empty() && details.is_empty() {
        details.push("the CSV text holds no matrix rows".to_owned());
    }
    (
        CsvMatrix {
            rows,
            lines: row_lines,
        },
        details,
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse(text: &str, names: &[&str]) -> (CsvMatrix, Vec<String>) {
        let ids: Vec<String> = names.iter().map(|s| (*s).to_owned()).collect();
        super::parse(text, Some(&ids))
    }

    #[test]
    fn a_header_row_is_recognised_and_must_match_the_deme_ids() {
        let (m, d) = parse("a,b\n0,1\n\n 2 , 3 \n", &["a", "b"]);
        assert!(d.is_empty(), "{d:?}");
        assert_eq!(
            m.rows,
            vec![vec![Some(0.0), Some(1.0)], vec![Some(2.0), Some(3.0)]]
        );
        assert_eq!(m.lines, vec![2, 4]);

        let (_, d) = parse("b,a\n0,1\n2,3\n", &["a", "b"]);
        assert_eq!(d.len(), 1);
        assert!(d[0].starts_with("line 1:"), "{d:?}");
    }

    #[test]
    fn numeric_ids_in_the_header_are_still_a_header() {
        let (m, d) = parse("1,2\n0,1\n1,0", &["1", "2"]);
        assert!(d.is_empty());
        assert_eq!(m.rows.len(), 2);
    }

    #[test]
    fn non_finite_cells_parse_and_text_cells_are_reported() {
        let (m, d) = parse("0,NaN\ninf,x\n\"1\",\n", &["a", "b"]);
        assert!(m.rows[0][1].unwrap().is_nan());
        assert_eq!(m.rows[1][0], Some(f64::INFINITY));
        assert_eq!(m.rows[1][1], None);
        assert_eq!(m.rows[2], vec![Some(1.0), None]);
        assert_eq!(d.len(), 2, "{d:?}");
        assert!(d[0].contains("line 2, field 2"));
        assert!(d[1].contains("line 3, field 2: the cell is empty"));
    }

    #[test]
    fn quoted_fields_follow_rfc_4180_quoting() {
        // RFC 4180, section 2: a double quote inside a quoted field is written twice.
        assert_eq!(fields(r#" "a""b" , c"#).unwrap(), vec!["a\"b", "c"]);
        assert!(fields(r#""open"#).is_err());
    }
}
