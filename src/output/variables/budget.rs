//! The variables of the PV budget along isentropic trajectories: on the
//! isentropic layers (the column budget) and surfaces (the PV change).

use super::VarSpec;
use crate::output::cf::Vertical;

/// Predicted relative vorticity.
pub const ZETA_PRED: VarSpec = VarSpec {
    name: "bud_zeta_pred",
    standard_name: None,
    long_name: "relative vorticity the layer's column would have on arrival if (zeta + f)/depth were conserved along its trajectory since the previous step",
    units: "s-1",
    formula: "eta_d depth_a/depth_d - f_a = bud_zeta_dep + bud_zeta_stretch + bud_zeta_beta; eta_d, depth_d and f_d at the departure point of the layer-mean wind's semi-Lagrangian trajectory, depth_a and f_a on arrival (column-depth PV conservation; docs/references.md)",
};
/// Relative vorticity at the departure point.
pub const ZETA_DEP: VarSpec = VarSpec {
    name: "bud_zeta_dep",
    standard_name: None,
    long_name: "relative vorticity of the layer at the departure point, at the previous step",
    units: "s-1",
    formula: "zeta_d = eta_d - f_d, bilinear at the departure point",
};
/// Stretching part of the predicted change.
pub const ZETA_STRETCH: VarSpec = VarSpec {
    name: "bud_zeta_stretch",
    standard_name: None,
    long_name: "change of the layer's relative vorticity that the change of its pressure depth alone makes along the trajectory (stretching part)",
    units: "s-1",
    formula: "eta_d (depth_a/depth_d - 1); cyclonic (same sign as f) where the column is stretched",
};
/// Coriolis part of the predicted change.
pub const ZETA_BETA: VarSpec = VarSpec {
    name: "bud_zeta_beta",
    standard_name: None,
    long_name: "change of the layer's relative vorticity that the change of the Coriolis parameter along the trajectory makes with absolute vorticity kept (Coriolis part)",
    units: "s-1",
    formula: "-(f_a - f_d): poleward motion takes relative vorticity away in the north",
};
/// Actual relative vorticity of the layer.
pub const ZETA: VarSpec = VarSpec {
    name: "bud_zeta",
    standard_name: None,
    long_name: "relative vorticity of the layer-mean wind on arrival",
    units: "s-1",
    formula: "layer_pv * layer_dp - f",
};
/// Actual minus predicted.
pub const ZETA_DIFF: VarSpec = VarSpec {
    name: "bud_zeta_diff",
    standard_name: None,
    long_name: "actual minus conserved-PV prediction of the layer's relative vorticity",
    units: "s-1",
    formula: "bud_zeta - bud_zeta_pred; non-zero where heating, radiation or friction changes the column's PV, and where the layer-mean trajectory does not follow the column (vertical wind shear across a deep layer), or the trajectory or interpolation is in error",
};
/// Fractional depth change.
pub const STRETCH: VarSpec = VarSpec {
    name: "bud_stretch",
    standard_name: None,
    long_name:
        "fractional change of the layer's pressure depth along the trajectory (stretching > 0)",
    units: "1",
    formula: "(depth_a - depth_d)/depth_d",
};
/// Layer trajectories that did not converge.
pub const UNCONVERGED: VarSpec = VarSpec {
    name: "bud_unconverged",
    standard_name: None,
    long_name: "1 where the layer-mean wind's trajectory did not converge (the layer budget is missing there), 0 where it did",
    units: "1",
    formula: "midpoint iteration of each sub-step stopped when two successive departure points lie within the tolerance (leeward_trajectory_tolerance_m); missing where the trajectory left the grid or met missing winds",
};
/// Lagrangian rate of change of PV on isentropic surfaces.
pub const DPVDT: VarSpec = VarSpec {
    name: "bud_dpvdt",
    standard_name: None,
    long_name:
        "rate of change of Ertel potential vorticity following the wind on the isentropic surface (1 PVU per hour = 2.78e-10 K m2 kg-1 s-2)",
    units: "K m2 kg-1 s-2",
    formula:
        "(P_a - P_d)/dt, P_d at the departure point of the surface's own winds; where air is heated or cooled it crosses the surface, which this trajectory does not follow",
};
/// Surface trajectories that did not converge.
pub const DPVDT_UNCONVERGED: VarSpec = VarSpec {
    name: "bud_dpvdt_unconverged",
    standard_name: None,
    long_name: "1 where the isentropic surface wind's trajectory did not converge (bud_dpvdt is missing there), 0 where it did",
    units: "1",
    formula: "as bud_unconverged, for the trajectories of bud_dpvdt",
};

/// Every budget variable with its vertical coordinate (layers for the
/// column budget, surfaces for the PV change), as the budget writes them.
pub const ALL: [(VarSpec, Vertical); 10] = [
    (ZETA_PRED, Vertical::ThetaLayer),
    (ZETA_DEP, Vertical::ThetaLayer),
    (ZETA_STRETCH, Vertical::ThetaLayer),
    (ZETA_BETA, Vertical::ThetaLayer),
    (ZETA, Vertical::ThetaLayer),
    (ZETA_DIFF, Vertical::ThetaLayer),
    (STRETCH, Vertical::ThetaLayer),
    (UNCONVERGED, Vertical::ThetaLayer),
    (DPVDT, Vertical::Theta),
    (DPVDT_UNCONVERGED, Vertical::Theta),
];

/// The budget variable called `name`.
pub fn find(name: &str) -> Option<(VarSpec, Vertical)> {
    ALL.into_iter().find(|(v, _)| v.name == name)
}

/// The attribute of the budget's flag variables that counts the points whose
/// trajectory did not converge.
pub const NOT_CONVERGED_ATTR: &str = "leeward_trajectories_not_converged";
