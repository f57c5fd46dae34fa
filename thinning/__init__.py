"""thinning: capillary-thinning extensional rheometry from high-speed recordings.

The public names, in the order of the pipeline (each imported when first used, so
``import thinning`` stays light):

====================  ==============================================================
open a source         :func:`open_source`
options and units     :func:`options_from_text`, :class:`AnalysisOptions`, :class:`Calibration`
find the layout       :func:`find_layout`
measure the neck      :func:`measure_recording` (frames → :class:`NeckSeries`, pixels)
convert to SI         :func:`to_physical`
prepare the series    :func:`prepare_series` (→ :class:`DiameterSeries`)
local slopes          :func:`local_log_slopes`
locate regimes        :func:`locate_regimes`
fit                   :func:`fit_elastocapillary`, :func:`fit_viscocapillary`,
                      :func:`fit_inertiocapillary`, :func:`fit_finite_extensibility`
characterise          :func:`characterise`
analyse               :func:`analyse` (source + options → :class:`Result`)
write                 :func:`write_outputs`, :func:`analyse_to` (both); :func:`read_result`
figures               :func:`plot_diameter`, :func:`plot_strain_rate`,
                      :func:`plot_extensional_viscosity`, :func:`plot_frame_strip`
run a batch           :func:`run_batch`, :func:`read_batch`
open the records      :func:`open_records`
judge a lot           :func:`lot_verdict`, :func:`lot_summaries`
control chart         :func:`control_chart`, :func:`plot_control_chart`, :func:`plot_lot_curves`
lot report            :func:`write_lot_report`
====================  ==============================================================

Every user-fixable problem is a :class:`ThinningError` with one sentence.
"""

from importlib import import_module
from importlib.metadata import PackageNotFoundError, version as _version

try:
    __version__ = _version("thinning")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+unknown"

#: public name → module it lives in (stage order)
_PUBLIC = {
    "open_source": "thinning.frames",
    "options_from_text": "thinning.units",
    "AnalysisOptions": "thinning.units",
    "Calibration": "thinning.units",
    "find_layout": "thinning.measure",
    "measure_recording": "thinning.measure",
    "NeckSeries": "thinning.measure",
    "to_physical": "thinning.measure",
    "prepare_series": "thinning.series",
    "DiameterSeries": "thinning.series",
    "local_log_slopes": "thinning.kinematics",
    "locate_regimes": "thinning.regimes",
    "fit_elastocapillary": "thinning.fits",
    "fit_viscocapillary": "thinning.fits",
    "fit_inertiocapillary": "thinning.fits",
    "fit_finite_extensibility": "thinning.fits",
    "characterise": "thinning.characterisation",
    "analyse": "thinning.analysis",
    "write_outputs": "thinning.analysis",
    "analyse_to": "thinning.analysis",
    "Result": "thinning.result",
    "read_result": "thinning.result",
    "plot_diameter": "thinning.plots",
    "plot_strain_rate": "thinning.plots",
    "plot_extensional_viscosity": "thinning.plots",
    "plot_frame_strip": "thinning.plots",
    "run_batch": "thinning.batch",
    "read_batch": "thinning.batch",
    "open_records": "thinning.records",
    "lot_verdict": "thinning.qc",
    "lot_summaries": "thinning.qc",
    "control_chart": "thinning.qc",
    "plot_control_chart": "thinning.plots",
    "plot_lot_curves": "thinning.plots",
    "write_lot_report": "thinning.report.lot",
    "ThinningError": "thinning.errors",
}

__all__ = ["__version__", *_PUBLIC]


def __getattr__(name):
    if name in _PUBLIC:
        value = getattr(import_module(_PUBLIC[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'thinning' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_PUBLIC))
