//! Settings that choose one of a few named options, as typed enums.
//!
//! [`choice!`] declares an enum whose TOML form is a string; an unknown string is refused
//! with `must be "a" or "b" (got "c")`, which the configuration loader prefixes with the key.

/// `"a"`, `"a" or "b"`, `"a", "b" or "c"`.
pub fn one_of(names: &[&str]) -> String {
    let quoted: Vec<String> = names.iter().map(|n| format!("{n:?}")).collect();
    match quoted.len() {
        0 => String::new(),
        1 => quoted[0].clone(),
        n => format!("{} or {}", quoted[..n - 1].join(", "), quoted[n - 1]),
    }
}

/// The message for an option that is not one of `names`.
pub fn refusal(names: &[&str], got: &str) -> String {
    format!("must be {} (got {got:?})", one_of(names))
}

/// Declare a choice enum: `choice! { /// doc \n pub enum Mode { /// doc \n Auto = "auto", ... } }`.
#[macro_export]
macro_rules! choice {
    ($(#[$m:meta])* pub enum $name:ident { $($(#[$vm:meta])* $var:ident = $text:literal),+ $(,)? }) => {
        $(#[$m])*
        #[derive(Clone, Copy, Debug, PartialEq, Eq)]
        pub enum $name {
            $($(#[$vm])* $var),+
        }
        impl $name {
            /// Every option as written in a trial file, in declaration order.
            pub const NAMES: &'static [&'static str] = &[$($text),+];
            /// The option written `name` in a trial file.
            pub fn from_name(name: &str) -> Option<Self> {
                match name {
                    $($text => Some(Self::$var),)+
                    _ => None,
                }
            }
            /// The option as written in a trial file.
            pub fn as_str(self) -> &'static str {
                match self {
                    $(Self::$var => $text),+
                }
            }
        }
        impl std::fmt::Display for $name {
            fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                f.write_str(self.as_str())
            }
        }
        impl serde::Serialize for $name {
            fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
                s.serialize_str(self.as_str())
            }
        }
        impl<'de> serde::Deserialize<'de> for $name {
            fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
                let text = String::deserialize(d)?;
                Self::from_name(&text).ok_or_else(|| {
                    <D::Error as serde::de::Error>::custom($crate::choice::refusal(
                        Self::NAMES,
                        &text,
                    ))
                })
            }
        }
    };
}

#[cfg(test)]
mod tests {
    crate::choice! {
        /// A test choice.
        pub enum Side { Left = "left", Right = "right", Both = "both" }
    }

    #[test]
    fn names_and_messages() {
        assert_eq!(super::one_of(&["a", "b"]), "\"a\" or \"b\"");
        assert_eq!(Side::Both.as_str(), "both");
        let ok: Side = toml::Value::String("right".into()).try_into().unwrap();
        assert_eq!(ok, Side::Right);
        let e = Side::deserialize(toml::Value::String("up".into())).unwrap_err();
        assert_eq!(
            e.to_string().trim_end(),
            "must be \"left\", \"right\" or \"both\" (got \"up\")"
        );
    }
    use serde::Deserialize;
}
