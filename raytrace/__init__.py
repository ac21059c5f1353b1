"""raytrace: Monte Carlo sightlines through electron-density boxes for resonant
photon -> dark-photon conversion.

Data flow, one package per stage (each imports only the ones above it here)::

    core/, physics/, kernels/         errors and outputs; constants, plasma mass, conversion, cosmology; numba
    boxes/                            HDF5 box files, particles, yt -> Box / BoxSeries
      -> tracing/                     rays through stacked, transformed copies -> per-row kernels
      -> statistics/                  SightlineResult: mean, spread, per redshift bin and density class;
                                      one-point-PDF mean and the built-in check
      -> sky/                         HEALPix light cone, dT/T, FITS; signal and noise from two splits per pixel
      -> limits/                      epsilon_max(m) from the CMB spectrum and from the sky against the TT spectrum;
                                      dark radiation into photons (spectrum, excess, limits)
      -> report/, cli/                figures, the one-page report, the command line

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
    "InputError": "core.errors",
    "RaytraceError": "core.errors",
    "Cosmology": "physics.cosmology",
    "IonisationHistory": "physics.ionisation",
    "MeanPlasma": "physics.background",
    "background_kernel": "physics.background",
    "plasma_mass": "physics.plasma",
    "electron_density": "physics.plasma",
    "crossing_kernel": "physics.conversion",
    "landau_zener_exponent": "physics.conversion",
    "crossing_probability": "physics.conversion",
    "combine_crossings": "physics.conversion",
    "probability_from_kernel": "physics.conversion",
    "Box": "boxes",
    "BoxSeries": "boxes",
    "load_box": "boxes",
    "load_series": "boxes",
    "grid_particles": "boxes.gridding",
    "cast_sightlines": "statistics.results",
    "DaskExecutor": "tracing.cluster",
    "SightlineResult": "statistics.results",
    "cast_sky": "sky.maps",
    "SkyResult": "sky.maps",
    "spectral_limit": "limits.spectral",
    "sky_spectra": "sky.spectra",
    "anisotropy_limits": "limits.anisotropy",
    "pixel_window": "sky.pixelwindow",
    "planck_tt": "limits.cmbpower",
    "pdf_mean": "statistics.onepoint",
    "PdfMean": "statistics.onepoint",
    "degrade": "statistics.resolution",
    "resolution_convergence": "statistics.resolution",
    "read_spectrum": "limits.spectrum",
    "BinnedKernels": "statistics.binstats",
    "DecayingDarkMatter": "physics.darksources",
    "TabulatedSource": "physics.darksources",
    "converted_photons": "limits.darkradiation",
    "converted_photon_map": "limits.darkradiation",
    "added_photon_limit": "limits.darklimits",
    "radio_limit": "limits.darklimits",
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
