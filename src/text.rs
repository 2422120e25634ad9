//! Small text helpers shared by every layer that echoes a caller's text back in a message.
//!
//! A name, an id or a cell that a caller sent can be arbitrarily long; an error that quotes it
//! whole would let the caller make the answer (or a log line) huge. Everything quoted goes
//! through [`clip`].

/// How many characters of a caller's text an error message quotes.
pub(crate) const ECHO_CHARS: usize = 80;

/// `text` cut to at most `max` characters, with an ellipsis when something was cut.
pub(crate) fn clip(text: &str, max: usize) -> String {
    match text.char_indices().nth(max) {
        None => text.to_owned(),
        Some((end, _)) => format!("{}…", &text[..end]),
    }
}

/// Escapes text for XML or HTML, in an attribute value or element content: the five markup
/// characters as entity references, and tab, line feed and carriage return as character
/// references (an XML parser normalizes them to spaces inside an attribute; so kept they read
/// back unchanged). PMML export and the backtest's HTML report both write through it.
pub(crate) fn escape_markup(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&apos;"),
            '\t' => out.push_str("&#9;"),
            '\n' => out.push_str("&#10;"),
            '\r' => out.push_str("&#13;"),
            c => out.push(c),
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::clip;

    #[test]
    fn short_text_is_quoted_whole_and_long_text_is_cut_on_a_character_boundary() {
        assert_eq!(clip("abc", 3), "abc");
        assert_eq!(clip("abcd", 3), "abc…");
        // Multi-byte characters count as one each and are never split.
        assert_eq!(clip("ééééé", 2), "éé…");
        assert_eq!(clip("", 0), "");
    }
}
