//! A matrix pasted as text.
//!
//! Two forms are read: plain rows on lines with values separated by commas, tabs or spaces (as
//! spreadsheets and CSV export them; lines starting with `#` are comments), and the bracketed
//! nested-list form that Python and NumPy print (`[[1, 2], [3, 4]]`, `[[1. 2.]\n [3. 4.]]`,
//! optionally wrapped in `array(…, dtype=…)`). Values parse as `f32`; NaN and infinities are
//! accepted here and counted later, so the user sees where they are.

use super::{DType, Tensor};
use crate::error::{Error, Result};
use ndarray::Array2;

/// Name given to a pasted tensor (a text file is named after the file instead).
pub const PASTED_NAME: &str = "pasted";

fn error(line: usize, column: usize, detail: impl Into<String>) -> Error {
    Error::Parse { line, column, detail: detail.into() }
}

/// A row of values with the position where it started, for messages.
struct Row {
    values: Vec<f32>,
    line: usize,
    column: usize,
}

/// Parse pasted text into a 2-D tensor, unnamed: its name says where it came from.
pub fn parse(text: &str) -> Result<Tensor> {
    let rows = if text.trim_start().starts_with('[') || text.trim_start().starts_with("array(") {
        bracketed_rows(text)?
    } else {
        plain_rows(text)?
    };
    let Some(first) = rows.first() else {
        return Err(error(1, 1, "no numbers found; paste rows of numbers or a nested list like [[1, 2], [3, 4]]"));
    };
    let cols = first.values.len();
    for row in &rows {
        if row.values.len() != cols {
            return Err(error(
                row.line,
                row.column,
                format!("this row has {} values but the first row has {cols}", row.values.len()),
            ));
        }
    }
    let n_rows = rows.len();
    // The rows hold about one f32 per two characters of text; the flat copy is refused here,
    // before it is made, when it would pass the element cap (the page's wasm memory).
    super::element_count(&[n_rows, cols])?;
    let values: Vec<f32> = rows.into_iter().flat_map(|r| r.values).collect();
    let values = Array2::from_shape_vec((n_rows, cols), values).expect("rows checked equal");
    Ok(Tensor::from_values("", DType::F32, values))
}

fn number(token: &str, line: usize, column: usize) -> Result<f32> {
    let value = token.parse::<f32>().map_err(|_| error(line, column, format!("'{token}' is not a number")))?;
    // A written number too large for f32 parses as infinity, which the user never typed.
    if value.is_infinite() && !token.to_ascii_lowercase().contains("inf") {
        return Err(error(line, column, format!("'{token}' is beyond the f32 range (largest magnitude about 3.4e38)")));
    }
    Ok(value)
}

fn plain_rows(text: &str) -> Result<Vec<Row>> {
    let mut rows = Vec::new();
    for (index, line) in text.lines().enumerate() {
        let line_no = index + 1;
        let trimmed = line.trim();
        if trimmed.is_empty() || trimmed.starts_with('#') {
            continue;
        }
        let mut values = Vec::new();
        let mut token_start: Option<usize> = None;
        let mut last_was_comma = false;
        let column_of = |byte: usize| line[..byte].chars().count() + 1;
        for (pos, ch) in line.char_indices().chain(std::iter::once((line.len(), '\n'))) {
            let is_sep = ch == ',' || ch == '\t' || ch == ' ' || ch == ';' || ch == '\n' || ch == '\r';
            if !is_sep {
                token_start.get_or_insert(pos);
                last_was_comma = false;
                continue;
            }
            if let Some(start) = token_start.take() {
                values.push(number(&line[start..pos], line_no, column_of(start))?);
            } else if ch == ',' && (last_was_comma || values.is_empty()) {
                return Err(error(line_no, column_of(pos), "empty value between separators"));
            }
            if ch == ',' {
                last_was_comma = true;
            } else if ch == '\n' && last_was_comma {
                return Err(error(line_no, column_of(pos), "the line ends with a separator"));
            }
        }
        let column = line.len() - line.trim_start().len() + 1;
        rows.push(Row { values, line: line_no, column });
    }
    Ok(rows)
}

fn bracketed_rows(text: &str) -> Result<Vec<Row>> {
    let mut rows = Vec::new();
    let mut depth = 0usize;
    let mut closed = false;
    let mut current: Option<Row> = None;
    let mut outer_values: Option<Row> = None;
    let mut token: Option<(usize, usize, usize)> = None; // (byte start, line, column)
    let body = match text.trim_start().strip_prefix("array(") {
        Some(rest) => rest.rsplit_once(')').map_or(rest, |(inner, _)| inner),
        None => text,
    };
    // Positions in messages count from the start of the pasted text, not of `body`.
    let prefix = &text[..text.len() - text.trim_start().len() + if body.len() == text.len() { 0 } else { "array(".len() }];
    let mut line = 1 + prefix.matches('\n').count();
    let mut column = prefix.rsplit('\n').next().map_or(0, |tail| tail.chars().count());
    for (pos, ch) in body.char_indices().chain(std::iter::once((body.len(), ' '))) {
        if ch == '\n' {
            line += 1;
            column = 0;
        } else {
            column += 1;
        }
        let is_token_char = !(ch.is_whitespace() || ch == ',' || ch == '[' || ch == ']');
        if is_token_char && depth > 0 {
            token.get_or_insert((pos, line, column));
            continue;
        }
        if let Some((start, l, c)) = token.take() {
            let value = number(&body[start..pos], l, c)?;
            match (depth, current.as_mut(), outer_values.as_mut()) {
                (2, Some(row), _) => row.values.push(value),
                (1, _, Some(row)) => row.values.push(value),
                (1, _, None) if rows.is_empty() => outer_values = Some(Row { values: vec![value], line: l, column: c }),
                _ => return Err(error(l, c, "a number sits outside the rows of the nested list")),
            }
        }
        match ch {
            '[' if closed => return Err(error(line, column, "text continues after the closing bracket")),
            '[' => {
                depth += 1;
                if depth > 2 {
                    return Err(error(line, column, "lists nested deeper than two levels; paste a 2-D matrix"));
                }
                if depth == 2 {
                    if outer_values.is_some() {
                        return Err(error(line, column, "numbers and rows are mixed in one list"));
                    }
                    current = Some(Row { values: Vec::new(), line, column });
                }
            }
            ']' => {
                if depth == 0 {
                    return Err(error(line, column, "']' without a matching '['"));
                }
                if depth == 2 {
                    rows.push(current.take().expect("opened at depth 2"));
                }
                depth -= 1;
                if depth == 0 {
                    rows.extend(outer_values.take());
                    closed = true;
                }
            }
            c if is_token_char && depth == 0 => {
                if closed {
                    if body[pos..].trim_start().starts_with("dtype") || c == ',' {
                        break;
                    }
                    return Err(error(line, column, "text continues after the closing bracket"));
                }
                return Err(error(line, column, "expected '[' to open the list"));
            }
            _ => {}
        }
    }
    if depth > 0 {
        return Err(error(line, column, "the list is not closed: a ']' is missing"));
    }
    Ok(rows)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn values(text: &str) -> (Vec<usize>, Vec<f32>) {
        let t = parse(text).unwrap();
        (t.shape.clone(), t.values.iter().copied().collect())
    }

    #[test]
    fn reads_plain_rows_with_any_separator() {
        assert_eq!(values("1, 2, 3\n4\t5\t6\n"), (vec![2, 3], vec![1., 2., 3., 4., 5., 6.]));
        assert_eq!(values("# weights\n 1 2\n\n-3e-1   4.5\r\n"), (vec![2, 2], vec![1., 2., -0.3, 4.5]));
    }

    #[test]
    fn reads_the_printed_nested_list_forms() {
        assert_eq!(values("[[1, 2], [3, 4]]"), (vec![2, 2], vec![1., 2., 3., 4.]));
        assert_eq!(values("[[1. 2.]\n [3. 4.]]"), (vec![2, 2], vec![1., 2., 3., 4.]));
        assert_eq!(values("[0.5, -1, 2]"), (vec![1, 3], vec![0.5, -1., 2.]));
        assert_eq!(values("array([[1., 2.],\n       [3., 4.]], dtype=float32)"), (vec![2, 2], vec![1., 2., 3., 4.]));
    }

    #[test]
    fn names_the_line_and_column_of_each_problem() {
        let at = |text: &str| match parse(text) {
            Err(Error::Parse { line, column, .. }) => (line, column),
            other => panic!("expected a parse error for {text:?}, got {other:?}"),
        };
        assert_eq!(at(""), (1, 1));
        assert_eq!(at("  \n# only a comment\n"), (1, 1));
        assert_eq!(at("1 2 3\n4 5\n"), (2, 1));
        assert_eq!(at("1 2\n3 x4\n"), (2, 3));
        assert_eq!(at("1,,2"), (1, 3));
        assert_eq!(at("[[1, 2], [3]]"), (1, 10));
        assert_eq!(at("[[1, 2],\n [3, four]]"), (2, 6));
        assert_eq!(at("[[1, 2], [3, 4]"), (1, 16));
        assert_eq!(at("[[[1]]]"), (1, 3));
        assert_eq!(at("[1, [2]]"), (1, 5));
        // Beyond f32's largest finite value, about 3.4028e38 (IEEE 754 binary32): not infinity.
        assert_eq!(at("1 2\n3 1e39\n"), (2, 3));
        assert!(parse("-4e38").unwrap_err().to_string().contains("beyond the f32 range"));
        assert!(parse("3.4e38").is_ok());
    }

    #[test]
    fn keeps_non_finite_values_for_later_counting() {
        let t = parse("nan 1\ninf -inf").unwrap();
        assert_eq!(t.scan().non_finite.nan, 1);
        assert_eq!(t.scan().non_finite.inf, 2);
    }
}
