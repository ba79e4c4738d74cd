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
}

/// The output unit of one trial's crop: stages hold yields in kg/ha at standard moisture and
/// convert with this only where a table or report is written (or read back).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct YieldUnit {
    pub unit: OutputUnit,
    bushel_lb: f64,
    /// Values in memory are already in the output unit (the report, which presents the
    /// tables as they were written).
    as_written: bool,
}

impl YieldUnit {
    /// For tables without a yield column (t/ha would apply if one appeared).
    pub const NONE: YieldUnit = YieldUnit {
        unit: OutputUnit::THa,
        bushel_lb: f64::NAN,
        as_written: false,
    };
    /// The output unit for this crop (bushels need its bushel weight).
    pub fn new(unit: OutputUnit, crop: &Crop) -> YieldUnit {
        YieldUnit {
            unit,
            bushel_lb: crop.bushel_lb,
            as_written: false,
        }
    }
    /// The same unit, for code that works in it (reading a table gives the values as
    /// written, writing one writes them as they are).
    pub fn as_written(self) -> YieldUnit {
        YieldUnit {
            as_written: true,
            ..self
        }
    }
    pub fn suffix(&self) -> &'static str {
        self.unit.suffix()
    }
    pub fn label(&self) -> &'static str {
        self.unit.label()
    }
    /// kg/ha in the output unit.
    pub fn to_unit(&self, kg_ha: f64) -> f64 {
        if self.as_written {
            return kg_ha;
        }
        match self.unit {
            OutputUnit::THa => kg_ha / 1000.0,
            OutputUnit::BuAc => kg_ha / LB_AC_IN_KG_HA / self.bushel_lb,
        }
    }
    /// A value in the output unit in kg/ha.
    pub fn to_kg_ha(&self, v: f64) -> f64 {
        if self.as_written {
            return v;
        }
        v * self.kg_ha_per_unit()
    }
    /// kg/ha in one output unit (1000 for t/ha).
    pub fn kg_ha_per_unit(&self) -> f64 {
        match self.unit {
            OutputUnit::THa => 1000.0,
            OutputUnit::BuAc => LB_AC_IN_KG_HA * self.bushel_lb,
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
