//! The names a part and a lot go by in the registry, parsed once where they enter the service: a
//! [`PartNumber`] or a [`LotCode`] holds only text that passed its rules, so the operations and the
//! store take these types instead of checking strings again. Each has one fallible constructor,
//! `parse`, whose refusal is the text a client sees. Both serialize as their plain text, so an
//! answer that carries one reads exactly as a string would, and deserialize through `parse`.

use serde::{Deserialize, Serialize, Serializer};
use std::fmt;
use std::str::FromStr;

/// The longest part number, in characters (all ASCII, so also in bytes).
pub const PART_NUMBER_MAX_CHARS: usize = 64;

/// The longest lot code, in characters.
pub const LOT_CODE_MAX_CHARS: usize = 64;

/// A part number: 1 to 64 characters of ASCII letters, digits and `-_.+/#`, nothing else (no
/// spaces). Taken exactly as given: text with a space around it is refused, not trimmed into one.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord, Hash, Deserialize)]
#[serde(try_from = "String")]
pub struct PartNumber(String);

impl PartNumber {
    /// The part number `text` is, or why it is none (the refusal names the field and the text).
    pub fn parse(text: &str) -> Result<PartNumber, String> {
        let ok = !text.is_empty()
            && text.len() <= PART_NUMBER_MAX_CHARS
            && text
                .chars()
                .all(|c| c.is_ascii_alphanumeric() || "-_.+/#".contains(c));
        if ok {
            Ok(PartNumber(text.to_string()))
        } else {
            Err(format!(
                "part_number {text:?} must be 1 to 64 characters of letters, digits and -_.+/#"
            ))
        }
    }

    pub fn as_str(&self) -> &str {
        &self.0
    }

    pub fn into_string(self) -> String {
        self.0
    }
}

/// A lot code: 1 to 64 characters without control characters. Whitespace around it is not part of
/// it and is dropped; spaces inside are kept (`2024 W17` is a lot code).
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord, Hash, Deserialize)]
#[serde(try_from = "String")]
pub struct LotCode(String);

impl LotCode {
    /// The lot code `text` is once trimmed, or why it is none (the refusal names the field).
    pub fn parse(text: &str) -> Result<LotCode, String> {
        let t = text.trim();
        if t.is_empty() {
            return Err("lot is required".to_string());
        }
        if t.chars().count() > LOT_CODE_MAX_CHARS || t.chars().any(char::is_control) {
            return Err(format!(
                "lot must be at most {LOT_CODE_MAX_CHARS} characters without control characters"
            ));
        }
        Ok(LotCode(t.to_string()))
    }

    pub fn as_str(&self) -> &str {
        &self.0
    }

    pub fn into_string(self) -> String {
        self.0
    }
}

/// What the two names share: the plain text out (Display, serde, `AsRef<str>`), `parse` in
/// (`FromStr`, `TryFrom<String>`, serde).
macro_rules! text_name {
    ($name:ident) => {
        impl fmt::Display for $name {
            fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str(&self.0)
            }
        }

        impl AsRef<str> for $name {
            fn as_ref(&self) -> &str {
                &self.0
            }
        }

        impl Serialize for $name {
            fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
                serializer.serialize_str(&self.0)
            }
        }

        impl FromStr for $name {
            type Err = String;
            fn from_str(text: &str) -> Result<$name, String> {
                $name::parse(text)
            }
        }

        impl TryFrom<String> for $name {
            type Error = String;
            fn try_from(text: String) -> Result<$name, String> {
                $name::parse(&text)
            }
        }

        impl From<$name> for String {
            fn from(name: $name) -> String {
                name.0
            }
        }
    };
}

text_name!(PartNumber);
text_name!(LotCode);

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_part_number_is_letters_digits_and_six_marks() {
        for ok in ["EMI-220/3", "A", "x_y.z+1#2", &"9".repeat(64)] {
            assert_eq!(PartNumber::parse(ok).unwrap().as_str(), ok);
        }
        for bad in [
            "",
            "has space",
            " PC-1",
            "PC-1 ",
            "tab\there",
            "Ω-1",
            "a,b",
            &"9".repeat(65),
        ] {
            let e = PartNumber::parse(bad).unwrap_err();
            assert_eq!(
                e,
                format!(
                    "part_number {bad:?} must be 1 to 64 characters of letters, digits and -_.+/#"
                )
            );
        }
    }

    #[test]
    fn a_lot_code_is_trimmed_short_text_without_control_characters() {
        assert_eq!(LotCode::parse("  2024 W17 ").unwrap().as_str(), "2024 W17");
        assert_eq!(LotCode::parse("Ω-7").unwrap().as_str(), "Ω-7");
        // 64 characters, more than 64 bytes: the bound is on characters.
        let long = "Ω".repeat(64);
        assert_eq!(LotCode::parse(&long).unwrap().as_str(), long);
        assert_eq!(LotCode::parse("").unwrap_err(), "lot is required");
        assert_eq!(LotCode::parse(" \t ").unwrap_err(), "lot is required");
        let too_long = "lot must be at most 64 characters without control characters";
        assert_eq!(LotCode::parse(&"Ω".repeat(65)).unwrap_err(), too_long);
        assert_eq!(LotCode::parse("L\u{7}1").unwrap_err(), too_long);
    }

    #[test]
    fn both_names_are_plain_strings_in_json_and_are_checked_when_read() {
        let pn = PartNumber::parse("PC-100").unwrap();
        let lot = LotCode::parse("L 7").unwrap();
        assert_eq!(serde_json::to_string(&pn).unwrap(), r#""PC-100""#);
        assert_eq!(serde_json::to_string(&lot).unwrap(), r#""L 7""#);
        assert_eq!(pn.to_string(), "PC-100");
        assert_eq!(lot.to_string(), "L 7");
        assert_eq!(
            serde_json::from_str::<PartNumber>(r#""PC-100""#).unwrap(),
            pn
        );
        let bad = serde_json::from_str::<PartNumber>(r#""PC 100""#).unwrap_err();
        assert!(
            bad.to_string().contains("must be 1 to 64 characters"),
            "{bad}"
        );
        assert!(serde_json::from_str::<PartNumber>("7").is_err());
        // A lot read from JSON is trimmed as one given any other way.
        assert_eq!(serde_json::from_str::<LotCode>(r#"" L 7 ""#).unwrap(), lot);
        assert!(serde_json::from_str::<LotCode>(r#"" ""#).is_err());
        assert_eq!("PC-100".parse::<PartNumber>(), Ok(pn));
    }
}
