//! Number and text formatting rules for the report (documented in the README,
//! "Report formatting"). One place decides how every number looks, so the
//! Markdown, the HTML and the tables agree.

/// Decimals for estimates, standard errors and limits of one analysis: three
/// significant digits of the residual standard deviation (so a score with SD
/// 6.5 gets 2 decimals, a log-ratio with SD 0.065 gets 4), between 1 and 6.
pub fn decimals_for_scale(scale: f64) -> usize {
    if !(scale.is_finite() && scale > 0.0) {
        return 3;
    }
    let magnitude = scale.log10().floor() as i64;
    (2 - magnitude).clamp(1, 6) as usize
}

/// A fixed-decimal number; never prints "-0.00".
pub fn fixed(value: f64, decimals: usize) -> String {
    let text = format!("{value:.decimals$}");
    if text.starts_with('-')
        && text[1..]
            .chars()
            .all(|character| character == '0' || character == '.')
    {
        text[1..].to_string()
    } else {
        text
    }
}

/// A count with thousands separated by commas from 10 000 on ("12,345"); smaller counts as they are.
pub fn count(value: usize) -> String {
    let digits = value.to_string();
    if value < 10_000 {
        return digits;
    }
    let mut grouped = String::with_capacity(digits.len() + digits.len() / 3);
    for (index, character) in digits.chars().enumerate() {
        if index > 0 && (digits.len() - index).is_multiple_of(3) {
            grouped.push(',');
        }
        grouped.push(character);
    }
    grouped
}

/// A p-value: four decimals, or "< 0.0001".
pub fn p_value(p: f64) -> String {
    if p < 0.0001 {
        "< 0.0001".to_string()
    } else {
        fixed(p, 4)
    }
}

/// A test statistic: two decimals.
pub fn statistic(value: f64) -> String {
    fixed(value, 2)
}

/// Degrees of freedom: whole numbers without decimals, others with two.
pub fn degrees(df: f64) -> String {
    if df.fract() == 0.0 {
        format!("{df:.0}")
    } else {
        fixed(df, 2)
    }
}

/// A confidence interval "lower to upper".
pub fn interval(lower: f64, upper: f64, decimals: usize) -> String {
    format!("{} to {}", fixed(lower, decimals), fixed(upper, decimals))
}

/// A confidence level as a percentage without needless decimals ("95%", "97.5%").
pub fn percent(level: f64) -> String {
    let scaled = level * 100.0;
    let text = format!("{scaled:.4}");
    let text = text.trim_end_matches('0').trim_end_matches('.');
    format!("{text}%")
}

/// Escape text from the plan or the data for Markdown, so that it shows as
/// written and can never become markup: every character that can open
/// emphasis, code, a link, a table cell, an entity, raw HTML or the closing
/// `#`s of a heading is backslash-escaped (links and images cannot start
/// without `[`), and line breaks become spaces.
pub fn markdown_text(text: &str) -> String {
    let mut escaped = String::with_capacity(text.len());
    for character in text.chars() {
        match character {
            '\\' | '`' | '*' | '_' | '{' | '}' | '[' | ']' | '<' | '>' | '|' | '~' | '&' | '#' => {
                escaped.push('\\');
                escaped.push(character);
            }
            '\n' | '\r' | '\t' => escaped.push(' '),
            _ => escaped.push(character),
        }
    }
    escaped
}

/// Text from the plan or the data as a whole Markdown code span, backticks
/// included, shown exactly as written. Inside a code span a backslash is
/// literal, so [`markdown_text`] would leave its escapes visible (`a\_b`);
/// instead the fence is one backtick longer than the longest run of backticks
/// in the text, and a space pads each side when the text starts or ends with
/// a backtick or a space (CommonMark strips one such pair). `<` and `&` are
/// safe in a code span: the HTML step escapes them. Not for table cells: a
/// `|` would still split the cell there.
pub fn markdown_code(text: &str) -> String {
    let text = text.replace(['\n', '\r', '\t'], " ");
    if text.is_empty() {
        return String::new();
    }
    let mut longest_run = 0;
    let mut run = 0;
    for character in text.chars() {
        run = if character == '`' { run + 1 } else { 0 };
        longest_run = longest_run.max(run);
    }
    let fence = "`".repeat(longest_run + 1);
    let pad = if text.starts_with(['`', ' ']) || text.ends_with(['`', ' ']) {
        " "
    } else {
        ""
    };
    format!("{fence}{pad}{text}{pad}{fence}")
}

/// A full-precision number for tables/*.csv: the shortest text that reads back
/// to the same double.
pub fn exact(value: f64) -> String {
    serde_json::to_string(&value).unwrap_or_else(|_| "NA".to_string())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn formatting_rules() {
        assert_eq!(decimals_for_scale(6.5), 2);
        assert_eq!(decimals_for_scale(0.065), 4);
        assert_eq!(decimals_for_scale(650.0), 1);
        assert_eq!(fixed(-0.0001, 2), "0.00");
        assert_eq!(fixed(-1.005, 1), "-1.0");
        assert_eq!(p_value(0.00001), "< 0.0001");
        assert_eq!(p_value(0.04964), "0.0496");
        assert_eq!(percent(0.95), "95%");
        assert_eq!(percent(0.975), "97.5%");
        assert_eq!(degrees(276.0), "276");
        assert_eq!(count(9_999), "9999");
        assert_eq!(count(10_000), "10,000");
        assert_eq!(count(1_234_567), "1,234,567");
        assert_eq!(markdown_text("<b>x</b> | y"), "\\<b\\>x\\</b\\> \\| y");
        assert_eq!(markdown_text("score #"), "score \\#");
        assert_eq!(markdown_code("score_change"), "`score_change`");
        assert_eq!(markdown_code("a`b``c"), "```a`b``c```");
        assert_eq!(markdown_code("`x"), "`` `x ``");
        assert_eq!(markdown_code(""), "");
        assert_eq!(exact(0.1), "0.1");
        assert_eq!(exact(1e-300), "1e-300");
    }
}
