//! Crops (standard moisture, bushel weight, biological yield bounds, from
//! `config/crops.toml`) and the units yields are reported in.

use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

/// Unit of the output yields.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum OutputUnit {
    /// Tonnes per hectare.
    THa,
    /// Bushels per acre (bushel weight from the crop table).
    BuAc,
}

impl OutputUnit {
    /// Suffix used in column names, e.g. `yield_mean_t_ha`.
    pub fn suffix(self) -> &'static str {
        match self {
            OutputUnit::THa => "t_ha",
            OutputUnit::BuAc => "bu_ac",
        }
    }
    /// Human label, e.g. `t/ha`.
    pub fn label(self) -> &'static str {
        match self {
            OutputUnit::THa => "t/ha",
            OutputUnit::BuAc => "bu/ac",
        }
    }
    /// Convert kg/ha at standard moisture to this unit.
    pub fn from_kg_ha(self, kg_ha: f64, crop: &Crop) -> f64 {
        match self {
            OutputUnit::THa => kg_ha / 1000.0,
            // 1 lb/ac = 1.120851 kg/ha (definitions of the pound and the acre).
            OutputUnit::BuAc => kg_ha / LB_AC_IN_KG_HA / crop.bushel_lb,
        }
    }
}

/// 1 lb/ac in kg/ha: 0.45359237 kg / 0.40468564224 ha (definitions of pound and acre).
pub const LB_AC_IN_KG_HA: f64 = 0.45359237 / 0.40468564224;

/// One crop of the crop table.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Crop {
    pub standard_moisture_pct: f64,
    pub bushel_lb: f64,
    pub yield_min_kg_ha: f64,
    pub yield_max_kg_ha: f64,
}

/// The crop table of `config/crops.toml`.
pub fn crop_table() -> BTreeMap<String, Crop> {
    toml::from_str(crate::defaults::CROPS_TOML)
        .expect("config/crops.toml is valid (checked by a unit test)")
}
