//! Text in messages: at most a couple of hundred characters of anything the user supplied.

/// At most this many characters of a cell, name or value are echoed in a message.
pub(crate) const ECHO: usize = 200;

/// `text` cut to [`ECHO`] characters, saying how many more there were.
pub(crate) fn clip(text: &str) -> String {
    let n = text.chars().count();
    if n <= ECHO {
        text.to_string()
    } else {
        let head: String = text.chars().take(ECHO).collect();
        format!("{head}… ({} more characters)", n - ECHO)
    }
}

/// Serde for an `f64` that may be NaN (meaning "no value"): written as JSON `null`, read back
/// as NaN, so the file parses again.
pub(crate) mod nan_as_null {
    use serde::{Deserialize, Deserializer, Serializer};

    /// Writes NaN (or an infinity) as `null`.
    pub(crate) fn serialize<S: Serializer>(v: &f64, s: S) -> Result<S::Ok, S::Error> {
        if v.is_finite() {
            s.serialize_f64(*v)
        } else {
            s.serialize_none()
        }
    }

    /// Reads `null` as NaN.
    pub(crate) fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<f64, D::Error> {
        Ok(Option::<f64>::deserialize(d)?.unwrap_or(f64::NAN))
    }
}
