"""loopcheck: stability, margins and design aids for the digitally sampled
current loop of a grid-connected inverter with an LCL filter.

Importing the package is cheap on purpose: nothing heavy (numpy, scipy,
control, matplotlib) is imported here, so ``loopcheck --help`` stays instant.
The public Python API (:mod:`loopcheck.api`, docs/api.md) is reachable from
the package itself and loads on first use::

    import loopcheck as lc
    case = lc.read_case("cases/commercial-30kva-weak-grid.toml")
    lc.analyse(case).verdict
"""

__version__ = "0.1.0"

_API = (
    "read_case", "case_from_dict", "analyse", "verdict_over_range", "stability_map", "design_point_line",
    "sweep_grid", "pick_gain", "closed_loop_summary", "impedance_study", "control_systems", "to_dict",
)

__all__ = ["__version__", *_API]


def __getattr__(name):
    if name in _API:
        from loopcheck import api

        return getattr(api, name)
    raise AttributeError(f"module 'loopcheck' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_API))

# The API's names must never equal a module name of the package: an
# imported submodule becomes a package attribute and would hide the function.
