//! The shipped defaults (`config/defaults.toml`) and crop table (`config/crops.toml`),
//! embedded in the binary so that a run needs no file beside it.

/// The defaults of every stage setting, as shipped in `config/defaults.toml`.
pub const DEFAULTS_TOML: &str = include_str!("../../config/defaults.toml");
/// The crop table, as shipped in `config/crops.toml`.
pub const CROPS_TOML: &str = include_str!("../../config/crops.toml");

/// One section of the shipped defaults, deserialised (e.g. `"adjust"`).
pub fn section<T: serde::de::DeserializeOwned>(name: &str) -> T {
    let tree: toml::Table = toml::from_str(DEFAULTS_TOML).expect("config/defaults.toml parses");
    tree.get(name)
        .cloned()
        .unwrap_or_else(|| panic!("config/defaults.toml has a [{name}] section"))
        .try_into()
        .unwrap_or_else(|e| panic!("config/defaults.toml [{name}]: {e}"))
}
