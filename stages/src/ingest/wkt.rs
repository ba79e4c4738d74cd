//! A projected CRS from its WKT 1 text (a Shapefile's `.prj`, ESRI or OGC flavour) as a
//! proj string for `proj4rs`, for the projections field data travels in: transverse
//! Mercator, Lambert conformal conic (1 or 2 standard parallels), Albers equal-area and
//! Lambert azimuthal equal-area, on any ellipsoid, in metres or feet. Datums: WGS 84, or a
//! datum the WKT gives `TOWGS84` parameters for, or one of the GRS 1980 datums tied to the
//! international terrestrial frame at the metre level (NAD83, ETRS89, RGF93, GDA94/2020,
//! SIRGAS, NZGD2000), which are read as WGS 84: within about 2 m, the same for points and
//! plots given in that datum. Checked against pyproj in `tests/fixtures/wkt_pyproj.csv`.

/// A WKT node: its keyword and arguments (quoted text, numbers, nodes).
#[derive(Debug)]
enum Arg {
    Text(String),
    Number(f64),
    Node(Node),
}

#[derive(Debug)]
struct Node {
    key: String,
    args: Vec<Arg>,
}

impl Node {
    fn child(&self, key: &str) -> Option<&Node> {
        self.args.iter().find_map(|a| match a {
            Arg::Node(n) if n.key.eq_ignore_ascii_case(key) => Some(n),
            _ => None,
        })
    }
    fn children<'a>(&'a self, key: &'a str) -> impl Iterator<Item = &'a Node> + 'a {
        self.args.iter().filter_map(move |a| match a {
            Arg::Node(n) if n.key.eq_ignore_ascii_case(key) => Some(n),
            _ => None,
        })
    }
    fn text(&self, i: usize) -> Option<&str> {
        match self.args.get(i) {
            Some(Arg::Text(t)) => Some(t),
            _ => None,
        }
    }
    fn number(&self, i: usize) -> Option<f64> {
        match self.args.get(i) {
            Some(Arg::Number(x)) => Some(*x),
            _ => None,
        }
    }
}

fn parse(s: &str) -> Result<Node, String> {
    let b: Vec<char> = s.chars().collect();
    node(&b, &mut 0)
}

fn skip_ws(b: &[char], at: &mut usize) {
    while *at < b.len() && b[*at].is_whitespace() {
        *at += 1;
    }
}

fn node(b: &[char], at: &mut usize) -> Result<Node, String> {
    skip_ws(b, at);
    let start = *at;
    while *at < b.len() && (b[*at].is_ascii_alphanumeric() || b[*at] == '_') {
        *at += 1;
    }
    let key: String = b[start..*at].iter().collect();
    skip_ws(b, at);
    if key.is_empty() || *at >= b.len() || !(b[*at] == '[' || b[*at] == '(') {
        return Err(format!("not WKT at character {}", *at + 1));
    }
    *at += 1;
    let mut args = Vec::new();
    loop {
        skip_ws(b, at);
        match b.get(*at) {
            None => return Err("WKT ends early".into()),
            Some(']') | Some(')') => {
                *at += 1;
                break;
            }
            Some(',') => *at += 1,
            Some('"') => {
                *at += 1;
                let s = *at;
                while *at < b.len() && b[*at] != '"' {
                    *at += 1;
                }
                args.push(Arg::Text(b[s..*at].iter().collect()));
                *at += 1;
            }
            Some(c) if c.is_ascii_digit() || *c == '-' || *c == '+' || *c == '.' => {
                let s = *at;
                while *at < b.len() && !matches!(b[*at], ',' | ']' | ')') && !b[*at].is_whitespace()
                {
                    *at += 1;
                }
                let t: String = b[s..*at].iter().collect();
                args.push(Arg::Number(
                    t.parse()
                        .map_err(|_| format!("{t:?} in the WKT is not a number"))?,
                ));
            }
            Some(_) => args.push(Arg::Node(node(b, at)?)),
        }
    }
    Ok(Node { key, args })
}

/// Datums on GRS 1980 read as WGS 84 (metre-level agreement), by words in their names.
const NEAR_WGS84: &[&str] = &[
    "WGS_1984",
    "WGS_84",
    "WGS84",
    "NORTH_AMERICAN_1983",
    "NAD83",
    "NAD_1983",
    "ETRS_1989",
    "ETRS89",
    "EUROPEAN_TERRESTRIAL",
    "RGF_1993",
    "RGF93",
    "RESEAU_GEODESIQUE_FRANCAIS_1993",
    "GDA_1994",
    "GDA94",
    "GEOCENTRIC_DATUM_OF_AUSTRALIA",
    "GDA2020",
    "SIRGAS",
    "NZGD_2000",
    "NZGD2000",
    "NEW_ZEALAND_GEODETIC_DATUM_2000",
];

/// The proj string of a projected CRS's WKT, or why it cannot be read.
pub fn proj_string(wkt: &str) -> Result<String, String> {
    let root = parse(wkt.trim())?;
    if !root.key.eq_ignore_ascii_case("PROJCS") {
        return Err(format!("a {} WKT, expected PROJCS", root.key));
    }
    let geog = root.child("GEOGCS").ok_or("no GEOGCS in the WKT")?;
    let datum = geog.child("DATUM").ok_or("no DATUM in the WKT")?;
    let datum_name = datum
        .text(0)
        .unwrap_or("")
        .to_ascii_uppercase()
        .replace([' ', '-'], "_");
    let sph = datum.child("SPHEROID").ok_or("no SPHEROID in the WKT")?;
    let (a, rf) = (
        sph.number(1).ok_or("SPHEROID without a semi-major axis")?,
        sph.number(2)
            .ok_or("SPHEROID without an inverse flattening")?,
    );
    let towgs84 = match datum.child("TOWGS84") {
        Some(t) => {
            let v: Vec<String> = (0..t.args.len())
                .filter_map(|i| t.number(i))
                .map(|x| format!("{x}"))
                .collect();
            format!(" +towgs84={}", v.join(","))
        }
        None if NEAR_WGS84.iter().any(|w| datum_name.contains(w)) => " +towgs84=0,0,0".into(),
        None => {
            return Err(format!(
                "its datum {:?} has no TOWGS84 parameters and is not one read as WGS 84",
                datum.text(0).unwrap_or("")
            ))
        }
    };
    if let Some(pm) = geog.child("PRIMEM").and_then(|p| p.number(1)) {
        if pm != 0.0 {
            return Err(format!("a prime meridian at {pm} degrees, not Greenwich"));
        }
    }
    let proj_name = root
        .child("PROJECTION")
        .and_then(|p| p.text(0))
        .ok_or("no PROJECTION in the WKT")?
        .to_ascii_lowercase();
    // The linear unit: the PROJCS's own UNIT (its last), metres per unit.
    let to_m = root
        .children("UNIT")
        .last()
        .and_then(|u| u.number(1))
        .unwrap_or(1.0);
    let mut params = std::collections::BTreeMap::new();
    for p in root.children("PARAMETER") {
        if let (Some(k), Some(v)) = (p.text(0), p.number(1)) {
            params.insert(k.to_ascii_lowercase(), v);
        }
    }
    let get = |names: &[&str], default: Option<f64>| -> Result<f64, String> {
        names
            .iter()
            .find_map(|n| params.get(*n).copied())
            .or(default)
            .ok_or_else(|| format!("no PARAMETER {} in the WKT", names[0]))
    };
    let lon0 = get(
        &[
            "central_meridian",
            "longitude_of_center",
            "longitude_of_origin",
        ],
        None,
    )?;
    let lat0 = get(&["latitude_of_origin", "latitude_of_center"], Some(0.0))?;
    // False easting and northing are in the linear unit; proj's +x_0/+y_0 in metres.
    let x0 = get(&["false_easting"], Some(0.0))? * to_m;
    let y0 = get(&["false_northing"], Some(0.0))? * to_m;
    let body = match proj_name.as_str() {
        "transverse_mercator" => format!(
            "+proj=tmerc +lat_0={lat0} +lon_0={lon0} +k_0={}",
            get(&["scale_factor"], Some(1.0))?
        ),
        "lambert_conformal_conic"
        | "lambert_conformal_conic_2sp"
        | "lambert_conformal_conic_1sp" => {
            let p1 = params.get("standard_parallel_1").copied();
            match (p1, params.get("standard_parallel_2").copied()) {
                (Some(a1), Some(a2)) => {
                    format!("+proj=lcc +lat_0={lat0} +lon_0={lon0} +lat_1={a1} +lat_2={a2}")
                }
                _ => format!(
                    "+proj=lcc +lat_0={lat0} +lon_0={lon0} +lat_1={} +k_0={}",
                    p1.unwrap_or(lat0),
                    get(&["scale_factor"], Some(1.0))?
                ),
            }
        }
        "albers" | "albers_conic_equal_area" => format!(
            "+proj=aea +lat_0={lat0} +lon_0={lon0} +lat_1={} +lat_2={}",
            get(&["standard_parallel_1"], None)?,
            get(&["standard_parallel_2"], None)?
        ),
        "lambert_azimuthal_equal_area" => format!("+proj=laea +lat_0={lat0} +lon_0={lon0}"),
        other => {
            return Err(format!(
                "the projection {other:?} is not one this program reads from WKT"
            ))
        }
    };
    Ok(format!(
        "{body} +x_0={x0} +y_0={y0} +a={a} +rf={rf}{towgs84} +to_meter={to_m} +no_defs"
    ))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::projection::Crs;

    #[test]
    fn prj_texts_of_six_projected_crss_read_as_pyproj_reads_them() {
        // tests/fixtures/wkt_pyproj.json (tests/fixtures/make_wkt_fixture.py, pyproj 3.7.2,
        // PROJ 9.5.1): ESRI WKT of Lambert-93, a Colorado state plane in US feet, ETRS89
        // LAEA, US Albers, NZTM and NAD83 / UTM 15N, with positions; x/y back to lon/lat
        // within 1e-8 degrees (about 1 mm).
        let v: serde_json::Value =
            serde_json::from_str(include_str!("../../../tests/fixtures/wkt_pyproj.json")).unwrap();
        let mut n = 0;
        for c in v["crs"].as_array().unwrap() {
            let code = &c["epsg"];
            let proj = proj_string(c["wkt"].as_str().unwrap())
                .unwrap_or_else(|e| panic!("EPSG:{code}: {e}"));
            let crs = Crs::parse(&proj).unwrap();
            for p in c["points"].as_array().unwrap() {
                let f = |i: usize| p[i].as_f64().unwrap();
                let (lon, lat) = crs.to_wgs84(f(0), f(1)).unwrap();
                assert!(
                    (lon - f(2)).abs() < 1e-8 && (lat - f(3)).abs() < 1e-8,
                    "EPSG:{code} ({proj}): ({}, {}) -> ({lon}, {lat}), pyproj ({}, {})",
                    f(0),
                    f(1),
                    f(2),
                    f(3)
                );
                n += 1;
            }
        }
        assert_eq!(n, 18);
    }

    #[test]
    fn what_cannot_be_read_says_why() {
        let e = |w: &str| proj_string(w).unwrap_err();
        assert!(e("GEOGCS[\"GCS_WGS_1984\"]").contains("expected PROJCS"));
        assert!(e("PROJCS[\"x\",GEOGCS[\"g\",DATUM[\"D_Tokyo\",SPHEROID[\"Bessel_1841\",6377397.155,299.1528128]]],PROJECTION[\"Transverse_Mercator\"],PARAMETER[\"Central_Meridian\",135]]")
            .contains("datum \"D_Tokyo\" has no TOWGS84"));
        assert!(e("PROJCS[\"x\",GEOGCS[\"g\",DATUM[\"D_WGS_1984\",SPHEROID[\"WGS_1984\",6378137,298.257223563]]],PROJECTION[\"Krovak\"],PARAMETER[\"Central_Meridian\",24]]")
            .contains("\"krovak\" is not one this program reads"));
        assert!(e("PROJCS[\"x\",GEOGCS[").contains("ends early"));
    }
}
