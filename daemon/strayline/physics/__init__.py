"""Pure physics of NV magnetometry: constants, spin Hamiltonian, field inversion,
ODMR line shapes, sensitivity, stray-field propagation, the fields of calibration
structures and their fit, the sheet moment with its error bars, wall profiles. No I/O."""

from strayline.physics.constants import (
    D_CRYO_HZ,
    D_ROOM_HZ,
    DD_DT_HZ_PER_K,
    G_NV,
    GAMMA_NV_HZ_PER_T,
    HF_14N_HZ,
    HF_15N_HZ,
    MU0,
    T_ROOM_K,
    zfs_hz,
)
from strayline.physics.hamiltonian import nv_axis, to_nv_frame, transition_frequencies_hz
from strayline.physics.inversion import (
    field_along_axis_from_resonances,
    field_from_resonances,
)
from strayline.physics.sensitivity import LINESHAPE_FACTOR, shot_noise_sensitivity_t_per_rthz
from strayline.physics.sheet_moment import (
    SheetMomentMap,
    hann_lowpass_a,
    reconstruct_sheet_moment,
    sheet_moment_from_projection_a,
)
from strayline.physics.spectrum import hyperfine_pattern, lorentzian, lorentzian_dips
from strayline.physics.strayfield import (
    bz_from_projection,
    dipole_field_t,
    film_edge_field_t,
    line_current_field_t,
    project_on_axis,
    sheet_moment_from_bz_a,
    stray_field_t,
    vector_from_projection,
    wavevectors,
)
from strayline.physics.structure_field import (
    StraightStructure,
    structure_field_nv_t,
    structure_field_t,
)
from strayline.physics.structure_fit import StructureFit, fit_structure_map
from strayline.physics.wall_profile import WallCutFit, fit_wall_cut, wall_profile_field_nv_t

__all__ = [
    "DD_DT_HZ_PER_K",
    "D_CRYO_HZ",
    "D_ROOM_HZ",
    "GAMMA_NV_HZ_PER_T",
    "G_NV",
    "HF_14N_HZ",
    "HF_15N_HZ",
    "LINESHAPE_FACTOR",
    "MU0",
    "T_ROOM_K",
    "SheetMomentMap",
    "StraightStructure",
    "StructureFit",
    "WallCutFit",
    "bz_from_projection",
    "dipole_field_t",
    "field_along_axis_from_resonances",
    "field_from_resonances",
    "film_edge_field_t",
    "fit_structure_map",
    "fit_wall_cut",
    "hann_lowpass_a",
    "hyperfine_pattern",
    "line_current_field_t",
    "lorentzian",
    "lorentzian_dips",
    "nv_axis",
    "project_on_axis",
    "reconstruct_sheet_moment",
    "sheet_moment_from_bz_a",
    "sheet_moment_from_projection_a",
    "shot_noise_sensitivity_t_per_rthz",
    "stray_field_t",
    "structure_field_nv_t",
    "structure_field_t",
    "to_nv_frame",
    "transition_frequencies_hz",
    "vector_from_projection",
    "wall_profile_field_nv_t",
    "wavevectors",
    "zfs_hz",
]
