"""fringegauge optics core: materials, transfer-matrix stacks and colour.

Pure numerics (numpy in, numpy out); no user-interface imports.
"""

from .errors import InputError, WavelengthRangeError
from .materials import (Material, ConstantMaterial, CauchyMaterial, SellmeierMaterial,
                        TabulatedMaterial, DatabaseMaterial, material, list_materials,
                        search_materials, curated_materials, database_version)
from .filmmodels import TaucLorentzMaterial, EffectiveMedium
from .stack import Layer, Stack, sweep
from . import grating
from .grating import rigorous_efficiency, rigorous_efficiency_detail
from .fit import fit_thickness, read_spectrum, FitResult, SpectrumData, optical_thickness_fft, reflectance_from_counts
from .filmfit import fit_film, FilmFitResult, FitCancelled
from .inverse import thickness_candidates, thickness_map, parse_color, Candidate, Candidates, ThicknessMap
from .camera import CameraCalibration, FlatField, calibrate_from_reference, calibrate_from_target, flat_field
from .color import (spectrum_to_xyz, xyz_to_lab, xyz_to_srgb, delta_e_2000, srgb_out_of_gamut,
                    spectra_to_srgb, illuminant_white_xyz, srgb_to_hex, lab_to_xyz, srgb_to_xyz)

__all__ = [
    "InputError", "WavelengthRangeError",
    "Material", "ConstantMaterial", "CauchyMaterial", "SellmeierMaterial", "TabulatedMaterial",
    "DatabaseMaterial", "material", "list_materials", "search_materials", "curated_materials",
    "database_version", "TaucLorentzMaterial", "EffectiveMedium",
    "Layer", "Stack", "sweep", "grating", "rigorous_efficiency", "rigorous_efficiency_detail",
    "fit_thickness", "fit_film", "FilmFitResult", "FitCancelled", "read_spectrum", "FitResult", "SpectrumData", "optical_thickness_fft", "reflectance_from_counts",
    "thickness_candidates", "thickness_map", "parse_color", "Candidate", "Candidates", "ThicknessMap",
    "CameraCalibration", "FlatField", "calibrate_from_reference", "calibrate_from_target", "flat_field",
    "spectrum_to_xyz", "xyz_to_lab", "xyz_to_srgb", "delta_e_2000", "srgb_out_of_gamut",
    "spectra_to_srgb", "illuminant_white_xyz", "srgb_to_hex", "lab_to_xyz", "srgb_to_xyz",
]
