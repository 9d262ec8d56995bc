//! Respiratory physiology used to describe gas epochs and, in the simulator,
//! to turn a gas time course into blood saturation: the ISO 2533 standard
//! atmosphere, the alveolar gas equation and the Severinghaus (1979)
//! oxygen dissociation curve.

pub mod gas;

pub use gas::{
    AIR_O2_FRACTION, MMHG_PER_PA, SEA_LEVEL_MMHG, WATER_VAPOUR_MMHG, altitude_for_pressure_m,
    alveolar_po2_mmhg, equivalent_altitude_m, equivalent_o2_fraction, pressure_at_altitude_mmhg,
    severinghaus_saturation,
};
