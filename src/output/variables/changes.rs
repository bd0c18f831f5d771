//! The variables of the changes in time: the change of a field over an interval
//! of a cycle, and its run-to-run change at the same valid time.

use std::collections::HashMap;
use std::sync::{Mutex, OnceLock};

use super::VarSpec;
use crate::output::cf::Vertical;

fn intern(name: String) -> &'static str {
    static NAMES: OnceLock<Mutex<HashMap<String, &'static str>>> = OnceLock::new();
    let map = NAMES.get_or_init(|| Mutex::new(HashMap::new()));
    let mut m = match map.lock() {
        Ok(m) => m,
        Err(p) => p.into_inner(),
    };
    if let Some(s) = m.get(&name) {
        return s;
    }
    let s: &'static str = Box::leak(name.clone().into_boxed_str());
    m.insert(name, s);
    s
}

/// The variable for the thickness change over `hours`.
pub fn thickness_change_spec(hours: u32) -> VarSpec {
    VarSpec {
        name: intern(format!("thick_chg_{hours:02}h")),
        standard_name: None,
        long_name: intern(format!("change of layer thickness over the previous {hours} h")),
        units: "m",
        formula: "thick(this step) - thick(the step of the same cycle valid that many hours earlier), both read from published files",
    }
}

/// The variable for the mean sea-level pressure change over `hours`.
pub fn mslp_change_spec(hours: u32) -> VarSpec {
    VarSpec {
        name: intern(format!("mslp_chg_{hours:02}h")),
        standard_name: None,
        long_name: intern(format!(
            "change of mean sea-level pressure over the previous {hours} h"
        )),
        units: "Pa",
        formula: "mslp(this step) - mslp(the step of the same cycle valid that many hours earlier), both read from published files",
    }
}

/// Run-to-run change of mean sea-level pressure.
pub const MSLP_R2R: VarSpec = VarSpec {
    name: "mslp_r2r",
    standard_name: None,
    long_name: "mean sea-level pressure of this cycle minus that of the previous cycle at the same valid time",
    units: "Pa",
    formula: "mslp(this cycle) - mslp(previous cycle), same valid time",
};

/// A field whose change over the intervals of a cycle is made, with its change
/// variable and vertical coordinate.
#[derive(Clone, Copy)]
pub struct Tendency {
    /// The field's name in the files.
    pub name: &'static str,
    /// The change's variable for an interval in hours.
    pub spec: fn(u32) -> VarSpec,
    /// Its vertical coordinate.
    pub vertical: Vertical,
}

/// Thickness and its change.
pub const THICK_TENDENCY: Tendency = Tendency {
    name: "thick",
    spec: thickness_change_spec,
    vertical: Vertical::PressureLayer,
};

/// Mean sea-level pressure and its change.
pub const MSLP_TENDENCY: Tendency = Tendency {
    name: "mslp",
    spec: mslp_change_spec,
    vertical: Vertical::Surface,
};

/// Run-to-run change of the thickness.
pub const THICK_R2R: VarSpec = VarSpec {
    name: "thick_r2r",
    standard_name: None,
    long_name: "layer thickness of this cycle minus that of the previous cycle at the same valid time",
    units: "m",
    formula: "thick(this cycle) - thick(previous cycle), same valid time, previous cycle read from its published file",
};

/// Run-to-run change of isobaric geopotential height.
pub const Z_R2R: VarSpec = VarSpec {
    name: "z_r2r",
    standard_name: None,
    long_name:
        "geopotential height of this cycle minus that of the previous cycle at the same valid time",
    units: "m",
    formula: "z(this cycle) - z(previous cycle), same valid time",
};

/// Run-to-run change of the dynamic tropopause pressure.
pub const TROP_P_R2R: VarSpec = VarSpec {
    name: "trop_p_r2r",
    standard_name: None,
    long_name: "dynamic tropopause pressure of this cycle minus that of the previous cycle at the same valid time",
    units: "Pa",
    formula: "trop_p(this cycle) - trop_p(previous cycle), same valid time",
};

/// The run-to-run variable and its vertical coordinate for a compared field.
pub fn r2r_spec(name: &str) -> Option<(VarSpec, Vertical)> {
    match name {
        "thick" => Some((THICK_R2R, Vertical::PressureLayer)),
        "z" => Some((Z_R2R, Vertical::Pressure)),
        "trop_p" => Some((TROP_P_R2R, Vertical::PvSurface)),
        "mslp" => Some((MSLP_R2R, Vertical::Surface)),
        _ => None,
    }
}
