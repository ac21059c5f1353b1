"""raytrace: Monte Carlo sightlines through electron-density boxes for resonant
photon -> dark-photon conversion.

Data flow, one module per stage::

    boxes (boxes/, gridding.py)            HDF5 box files -> Box / BoxSeries
      -> sightlines (rays.py)              random rays through stacked, transformed copies
      -> crossings + per-ray kernel        kernels/ (numba), engine.py
      -> statistics (results.py)           SightlineResult: mean, spread (files: resultfiles.py, backends.py)
      -> sky maps (sky.py)                 HEALPix light cone, C_l, dT/T
      -> limits (limits.py, spectrum.py)   epsilon_max(m) from the CMB spectrum and sky (tables, plots: limitset.py)
    when and where (redshiftbins.py, binstats.py, environments.py): the kernel per redshift bin and density class
    dark radiation into photons (darksources.py, darkradiation.py, darklimits.py): spectrum, excess, limits

A notebook session::

    import raytrace
    series = raytrace.load_series("cubes_demo/*.h5")
    result = raytrace.cast_sightlines(series, mass_eV=np.geomspace(1e-15, 1e-12, 64), n_rays=2000, z_max=6)
    result.mean(), result.percentiles()
    raytrace.spectral_limit(result.mass_eV, result.mean())
"""

from importlib import import_module

__version__ = "0.1.0"

# Public names and the module each lives in; imported on first use so that the
# CLI's --help and light uses do not pay for numba, camb or healpy.
_PUBLIC = {
    "InputError": "errors",
    "RaytraceError": "errors",
    "Cosmology": "cosmology",
    "IonisationHistory": "ionisation",
    "MeanPlasma": "background",
    "background_kernel": "background",
    "plasma_mass": "plasma",
    "electron_density": "plasma",
    "crossing_kernel": "conversion",
    "landau_zener_exponent": "conversion",
    "crossing_probability": "conversion",
    "combine_crossings": "conversion",
    "probability_from_kernel": "conversion",
    "Box": "boxes",
    "BoxSeries": "boxes",
    "load_box": "boxes",
    "load_series": "boxes",
    "grid_particles": "gridding",
    "cast_sightlines": "engine",
    "DaskExecutor": "cluster",
    "SightlineResult": "results",
    "cast_sky": "sky",
    "SkyResult": "sky",
    "spectral_limit": "limits",
    "pdf_mean": "onepoint",
    "PdfMean": "onepoint",
    "degrade": "resolution",
    "resolution_convergence": "resolution",
    "read_spectrum": "spectrum",
    "BinnedKernels": "binstats",
    "DecayingDarkMatter": "darksources",
    "TabulatedSource": "darksources",
    "converted_photons": "darkradiation",
    "converted_photon_map": "darkradiation",
    "added_photon_limit": "darklimits",
    "radio_limit": "darklimits",
}

__all__ = sorted(_PUBLIC) + ["__version__"]


def __getattr__(name):
    if name in _PUBLIC:
        value = getattr(import_module(f".{_PUBLIC[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'raytrace' has no attribute {name!r}")


def __dir__():
    return __all__
