//! Crops (standard moisture, bushel weight, biological yield bounds, from
//! `config/crops.toml`) and the units yields are reported in.

use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

/// Wet yield in kg/ha from mass flow (kg/s), speed (m/s) and swath width (m).
pub fn wet_yield_kg_ha(flow_kg_s: f64, speed_m_s: f64, width_m: f64) -> f64 {
    flow_kg_s * 10_000.0 / (speed_m_s * width_m)
}

/// Yield at standard moisture from wet yield and moisture (%), dry-matter basis
/// (UF/IFAS EDIS AG442, Mulvaney & Devkota).
pub fn to_standard_moisture(wet: f64, moisture_pct: f64, standard_pct: f64) -> f64 {
    wet * (100.0 - moisture_pct) / (100.0 - standard_pct)
}

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
/// 1 lb in kg and 1 ac in ha (definitions of the international pound and acre).
pub const LB_KG: f64 = 0.45359237;
pub const AC_HA: f64 = 0.40468564224;

crate::choice! {
    /// The quantity of grain a price is given for (at standard moisture).
    pub enum PriceUnit {
        /// A tonne (1,000 kg).
        Tonne = "t",
        /// A quintal (100 kg).
        Quintal = "q",
        /// A kilogram.
        Kilogram = "kg",
        /// A bushel of the trial's crop (its bushel weight in lb, `crop.bushel_lb`).
        Bushel = "bu",
    }
}

impl PriceUnit {
    /// kg of grain in one unit (a bushel needs the crop's bushel weight, lb).
    pub fn kg(self, bushel_lb: f64) -> f64 {
        match self {
            PriceUnit::Tonne => 1000.0,
            PriceUnit::Quintal => 100.0,
            PriceUnit::Kilogram => 1.0,
            PriceUnit::Bushel => bushel_lb * LB_KG,
        }
    }
}

crate::choice! {
    /// The area a cost (or a net return) is given for.
    pub enum AreaUnit {
        /// A hectare.
        Hectare = "ha",
        /// An acre (0.40468564224 ha).
        Acre = "ac",
    }
}

impl AreaUnit {
    /// Hectares in one unit.
    pub fn ha(self) -> f64 {
        match self {
            AreaUnit::Hectare => 1.0,
            AreaUnit::Acre => AC_HA,
        }
    }
}

crate::choice! {
    /// The unit of an input's rate in a rate trial: a quantity per area.
    pub enum RateUnit {
        /// Kilograms per hectare (nitrogen, seed by weight).
        KgHa = "kg_ha",
        /// Pounds per acre.
        LbAc = "lb_ac",
        /// Litres per hectare (a growth regulator, a liquid product).
        LHa = "l_ha",
        /// Seeds per hectare.
        SeedsHa = "seeds_ha",
        /// Seeds per acre.
        SeedsAc = "seeds_ac",
    }
}

crate::choice! {
    /// The quantity an input's price is given for.
    pub enum InputUnit {
        /// A kilogram.
        Kg = "kg",
        /// A pound.
        Lb = "lb",
        /// A litre.
        L = "l",
        /// A thousand seeds.
        ThousandSeeds = "1000_seeds",
    }
}

/// What an input's quantity measures: mass (kg), volume (l) or a count of seeds.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Quantity {
    Mass,
    Volume,
    Seeds,
}

impl RateUnit {
    /// What the rate measures, how many base units (kg, l or seeds) one rate unit's
    /// quantity is, and the area it is given per.
    pub fn parts(self) -> (Quantity, f64, AreaUnit) {
        match self {
            RateUnit::KgHa => (Quantity::Mass, 1.0, AreaUnit::Hectare),
            RateUnit::LbAc => (Quantity::Mass, LB_KG, AreaUnit::Acre),
            RateUnit::LHa => (Quantity::Volume, 1.0, AreaUnit::Hectare),
            RateUnit::SeedsHa => (Quantity::Seeds, 1.0, AreaUnit::Hectare),
            RateUnit::SeedsAc => (Quantity::Seeds, 1.0, AreaUnit::Acre),
        }
    }

    /// Base units (kg, l or seeds) per hectare in one rate unit.
    pub fn per_ha(self) -> f64 {
        let (_, base, area) = self.parts();
        base / area.ha()
    }

    /// The cost per hectare of one rate unit at `price` per `unit`, or None when the price's
    /// quantity does not measure what the rate does (a price per litre for a rate in kg).
    pub fn cost_per_ha(self, price: f64, unit: InputUnit) -> Option<f64> {
        let (q, base, area) = self.parts();
        let (pq, pbase) = match unit {
            InputUnit::Kg => (Quantity::Mass, 1.0),
            InputUnit::Lb => (Quantity::Mass, LB_KG),
            InputUnit::L => (Quantity::Volume, 1.0),
            InputUnit::ThousandSeeds => (Quantity::Seeds, 1000.0),
        };
        (q == pq).then(|| price / pbase * base / area.ha())
    }
}

/// One crop of the crop table.
#[derive(Clone, Debug, Default, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Crop {
    pub standard_moisture_pct: f64,
    pub bushel_lb: f64,
    /// Bounds of a single record's yield, kg/ha at standard moisture.
    pub yield_min_kg_ha: f64,
    pub yield_max_kg_ha: f64,
    /// Bounds of a plot's yield (0 = none: a plot outside the record bounds is flagged,
    /// not set aside); set per trial in `[crop]`.
    #[serde(default)]
    pub plot_yield_min_kg_ha: f64,
    #[serde(default)]
    pub plot_yield_max_kg_ha: f64,
    /// Plausible moisture at harvest of a crop harvested wet (forage), %; 0 = the grain
    /// bounds `clean.moisture.min_pct` and `max_pct`.
    #[serde(default)]
    pub moisture_min_pct: f64,
    #[serde(default)]
    pub moisture_max_pct: f64,
}

impl Crop {
    /// The moisture bounds the cleaning rules apply: the crop's own (forage crops), else
    /// the `[clean.moisture]` settings.
    pub fn moisture_bounds(&self, clean_min: f64, clean_max: f64) -> (f64, f64) {
        if self.moisture_max_pct > 0.0 {
            (self.moisture_min_pct, self.moisture_max_pct)
        } else {
            (clean_min, clean_max)
        }
    }
    /// Whether yields are reported as dry matter (standard moisture 0 %, forage crops).
    pub fn dry_matter(&self) -> bool {
        self.standard_moisture_pct == 0.0
    }
    /// Whether the trial bounds plot yields (`crop.plot_yield_*`).
    pub fn plot_bounds(&self) -> Option<(f64, f64)> {
        (self.plot_yield_max_kg_ha > 0.0)
            .then_some((self.plot_yield_min_kg_ha, self.plot_yield_max_kg_ha))
    }
}

/// `[crop]` of a trial file: values over the crop table's entry (0 = the table's value),
/// and bounds on a plot's yield (0 = none).
#[derive(Clone, Debug, Default, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct CropSettings {
    pub standard_moisture_pct: f64,
    pub bushel_lb: f64,
    pub yield_min_kg_ha: f64,
    pub yield_max_kg_ha: f64,
    pub plot_yield_min_kg_ha: f64,
    pub plot_yield_max_kg_ha: f64,
}

impl CropSettings {
    /// The table's crop with this section's values (those above 0) over it.
    pub fn over(&self, c: &Crop) -> Crop {
        let pick = |own: f64, table: f64| if own > 0.0 { own } else { table };
        Crop {
            standard_moisture_pct: pick(self.standard_moisture_pct, c.standard_moisture_pct),
            bushel_lb: pick(self.bushel_lb, c.bushel_lb),
            yield_min_kg_ha: pick(self.yield_min_kg_ha, c.yield_min_kg_ha),
            yield_max_kg_ha: pick(self.yield_max_kg_ha, c.yield_max_kg_ha),
            plot_yield_min_kg_ha: self.plot_yield_min_kg_ha,
            plot_yield_max_kg_ha: self.plot_yield_max_kg_ha,
            moisture_min_pct: c.moisture_min_pct,
            moisture_max_pct: c.moisture_max_pct,
        }
    }

    /// A crop defined by this section alone, or the keys it lacks (`crop.` + name).
    pub fn whole(&self) -> Result<Crop, Vec<String>> {
        let missing: Vec<String> = [
            ("standard_moisture_pct", self.standard_moisture_pct),
            ("bushel_lb", self.bushel_lb),
            ("yield_min_kg_ha", self.yield_min_kg_ha),
            ("yield_max_kg_ha", self.yield_max_kg_ha),
        ]
        .into_iter()
        .filter(|(_, v)| !(*v > 0.0))
        .map(|(k, _)| format!("crop.{k}"))
        .collect();
        if missing.is_empty() {
            Ok(self.over(&Crop::default()))
        } else {
            Err(missing)
        }
    }

    /// Range problems, each naming its key.
    pub fn problems(&self, p: &mut Vec<String>) {
        for (k, v) in [
            ("standard_moisture_pct", self.standard_moisture_pct),
            ("bushel_lb", self.bushel_lb),
            ("yield_min_kg_ha", self.yield_min_kg_ha),
            ("yield_max_kg_ha", self.yield_max_kg_ha),
            ("plot_yield_min_kg_ha", self.plot_yield_min_kg_ha),
            ("plot_yield_max_kg_ha", self.plot_yield_max_kg_ha),
        ] {
            if !(v >= 0.0 && v.is_finite()) {
                p.push(format!("crop.{k} must be 0 (not set) or above (got {v})"));
            }
        }
        if self.standard_moisture_pct >= 100.0 {
            p.push(format!(
                "crop.standard_moisture_pct must be below 100 (got {})",
                self.standard_moisture_pct
            ));
        }
        let (lo, hi) = (self.plot_yield_min_kg_ha, self.plot_yield_max_kg_ha);
        if (lo > 0.0 || hi > 0.0) && !(hi > lo) {
            p.push(format!(
                "crop.plot_yield_min_kg_ha must be below crop.plot_yield_max_kg_ha (got {lo} and {hi}); set the upper bound too"
            ));
        }
    }
}

/// The crop table of `config/crops.toml`.
pub fn crop_table() -> BTreeMap<String, Crop> {
    toml::from_str(crate::defaults::CROPS_TOML)
        .expect("config/crops.toml is valid (checked by a unit test)")
}
