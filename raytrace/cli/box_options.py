"""The box options every subcommand that reads boxes shares (schema: runfile.BOX_OPTIONS).

In: settings from :func:`raytrace.cli.runfile.settings`. Out: keyword arguments for
:func:`raytrace.boxes.load_boxes`, or the loaded series. A listable option holds
one value for every file or a list with one per file, in the files' order (globs
expanded and sorted by name); ``boxes.dataset`` as a list names datasets looked
up in every file.
"""

from raytrace.cli.runfile import BOX_OPTIONS, require

#: Box options as keyword arguments of load_box (the run-file key without "boxes.").
_LOAD_KEYS = ("dataset", "quantity", "box_size", "redshift", "hubble_h", "ionised_fraction", "neutral_fraction",
              "helium_electrons", "mean_density")

#: The box options besides the files, for commands that take the files as arguments.
BOX_SETTINGS = tuple(option for option in BOX_OPTIONS if option.key != "boxes.files")


def box_arguments(values, plasma=None):
    """Keyword arguments for raytrace.boxes.load_boxes from the [boxes] settings (unset ones left out)."""
    arguments = {} if plasma is None else {"plasma": plasma}
    for key in _LOAD_KEYS:
        value = values.get(f"boxes.{key}")
        if value is not None:
            arguments[key] = value
    return arguments


def load_run_series(values, options, plasma=None):
    """The BoxSeries the [boxes] settings describe (boxes.files required)."""
    from raytrace.boxes import load_series

    files = require(values, "boxes.files", options)
    return load_series(files if len(files) > 1 else files[0], blend=values["boxes.blend"],
                       **box_arguments(values, plasma))
