"""The ``thinning`` command: parse, call, print, exit (contract: docs/contract.md).

Exit status: 0 done, 2 bad usage or unusable input (one sentence, no
traceback), 1 internal error. Heavy modules are imported inside commands so
``thinning --help`` starts fast.
"""

from __future__ import annotations

import importlib
import logging
import os
import signal
import sys

import click

from . import __version__
from .errors import FULL_DISK_ERRNOS, NO_WRITE_ERRNOS, ThinningError
from .units import OPTION_FIELDS, BadQuantity, GEOMETRIES, options_from_text, plausible_range

#: subcommands living in their own modules: name → "module:attribute"
_LAZY_COMMANDS = {
    "batch": "thinning.cli_batch:batch",
    "records": "thinning.cli_records:records",
    "report": "thinning.cli_records:report",
    "demo": "thinning.demo:demo",
}

ANALYSIS_OPTION_HELP = {
    "fps": "Camera frame rate, e.g. '10kHz' or '25000/s'. Overrides a video container's rate, which "
           "for high-speed cameras is usually a playback rate; a native camera file (.cine, .mraw) "
           "carries its recording rate, and an --fps more than 0.1 % off it is refused unless "
           "--fps-override is given.",
    "pixel_size": "Image scale: object size of one pixel, e.g. '4.2um' or '4.2 µm/px'.",
    "reference_width": "Instead of --pixel-size: true width of the plates (or the nozzle's outer "
                       "diameter) seen in the frame, e.g. '3mm'; the tool measures it in pixels.",
    "surface_tension": "Surface tension of the liquid, e.g. '35mN/m' (required).",
    "density": "Density, e.g. '998kg/m^3' (optional: Rayleigh time, Ohnesorge, Deborah and Bond "
               "numbers).",
    "solvent_viscosity": "Solvent viscosity, e.g. '1.2mPa*s' (optional: regime checks).",
    "zero_shear_viscosity": "Zero-shear viscosity, e.g. '5mPa*s' (optional: Ohnesorge number and "
                            "Trouton ratio; falls back to the solvent viscosity).",
    "exposure": "Exposure time of each frame, e.g. '20us', for sources whose file does not carry it "
                "(a native camera file's own exposure wins); used to warn of motion blur.",
}


class FriendlyError(click.ClickException):
    """A one-sentence error, exit status 2."""

    exit_code = 2

    def show(self, file=None):
        click.echo(f"thinning: {self.format_message()}", err=True)


def analysis_options(func):
    """Decorate a command with every ``analyse`` option (shared by analyse and batch)."""
    decorators = [
        click.option("--fps", help=f"{ANALYSIS_OPTION_HELP['fps']} Default unit: 1/s; "
                          f"plausible range {plausible_range('fps')}."),
        click.option("--pixel-size", help=f"{ANALYSIS_OPTION_HELP['pixel_size']} Default unit: µm; "
                          f"plausible range {plausible_range('pixel_size')}."),
        click.option("--reference-width",
                     help=f"{ANALYSIS_OPTION_HELP['reference_width']} Default unit: mm; "
                          f"plausible range {plausible_range('reference_width')}."),
        click.option("--surface-tension",
                     help=f"{ANALYSIS_OPTION_HELP['surface_tension']} Default unit: mN/m; "
                          f"plausible range {plausible_range('surface_tension')}."),
        click.option("--density", help=f"{ANALYSIS_OPTION_HELP['density']} Default unit: kg/m³; "
                          f"plausible range {plausible_range('density')}."),
        click.option("--solvent-viscosity",
                     help=f"{ANALYSIS_OPTION_HELP['solvent_viscosity']} Default unit: mPa·s; "
                          f"plausible range {plausible_range('solvent_viscosity')}."),
        click.option("--zero-shear-viscosity",
                     help=f"{ANALYSIS_OPTION_HELP['zero_shear_viscosity']} Default unit: mPa·s; "
                          f"plausible range {plausible_range('zero_shear_viscosity')}."),
        click.option("--exposure", help=f"{ANALYSIS_OPTION_HELP['exposure']} Default unit: µs; "
                          f"plausible range {plausible_range('exposure')}."),
        click.option("--fps-override", is_flag=True, default=False,
                     help="Use --fps as the clock even where a native camera file's header gives "
                          "another recording rate (its time stamps are then not used)."),
        click.option("--geometry", type=click.Choice(GEOMETRIES), default=None,
                     help="'plates': step stretch between two end plates (default); "
                          "'dripping': dripping onto a substrate from a nozzle."),
        click.option("--roi", help="Crop 'x0,y0,x1,y1' in pixels (keeps x0 <= x < x1, y0 <= y < y1); "
                                   "found automatically otherwise. Example: '100,0,400,256'."),
    ]
    for decorator in reversed(decorators):
        func = decorator(func)
    return func


OPTION_NAMES = tuple(OPTION_FIELDS)


def parse_analysis_options(values: dict):
    """Command-line strings → :class:`~thinning.units.AnalysisOptions`, or a one-sentence exit 2.

    An option given with an empty value is refused (on the command line it is a slip, unlike an
    empty manifest cell, which means "the batch's value")."""
    for name in OPTION_NAMES:
        text = values.get(name)
        if isinstance(text, str) and not text.strip():
            raise FriendlyError(f"--{name.replace('_', '-')} was given an empty value; give one, "
                                "or leave the option out.")
    try:
        return options_from_text({name: values.get(name) for name in OPTION_NAMES})
    except BadQuantity as exc:
        raise FriendlyError(str(exc)) from None


class _Friendly:
    """Mixin: any user error of the tool (:class:`~thinning.errors.ThinningError`) raised while
    the command runs becomes its one sentence and exit status 2."""

    def invoke(self, ctx):
        try:
            return super().invoke(ctx)
        except ThinningError as exc:
            raise FriendlyError(str(exc)) from None


class FriendlyCommand(_Friendly, click.Command):
    """A command whose user errors exit 2 with one sentence."""


class FriendlyGroup(_Friendly, click.Group):
    """A group whose user errors exit 2 with one sentence."""

    command_class = FriendlyCommand


class LazyGroup(FriendlyGroup):
    """A group whose subcommands are imported only when used."""

    def list_commands(self, ctx):
        return sorted(set(super().list_commands(ctx)) | set(_LAZY_COMMANDS))

    def get_command(self, ctx, name):
        if name in _LAZY_COMMANDS:
            module_name, attribute = _LAZY_COMMANDS[name].split(":")
            return getattr(importlib.import_module(module_name), attribute)
        return super().get_command(ctx, name)


@click.group(cls=LazyGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="thinning")
@click.option("-v", "--verbose", count=True, help="More log lines on stderr (-vv for debug).")
def cli(verbose):
    """Capillary-thinning extensional rheometry from high-speed recordings.

    Measures the minimum neck diameter of a thinning filament in every frame,
    locates the thinning regimes, fits the relaxation time and apparent
    extensional viscosity with uncertainty, and keeps per-lot QC records.
    """
    level = logging.WARNING - 10 * verbose
    logging.basicConfig(level=max(level, logging.DEBUG), format="%(levelname)s %(name)s: %(message)s")


@cli.command()
@click.argument("source", type=click.Path())
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False),
              help="Output folder (created if needed); the tool's files in it are replaced atomically.")
@click.option("--figures", "figure_formats", default="png", show_default=True, metavar="FORMATS",
              help="Formats of the figures, comma-separated: png, svg (e.g. 'png,svg' also writes "
                   "diameter.svg …). The PNGs are always written: the report embeds them.")
@analysis_options
def analyse(source, out_dir, figure_formats, **values):
    """Analyse one recording: a video file, a multi-page TIFF or a folder of images.

    Writes OUT/result.json, OUT/diameter.csv, figures and OUT/report.html, and
    prints a short summary.

    Example:

    \b
      thinning analyse bridge.avi --out results/bridge \\
          --fps 10kHz --pixel-size 8um --surface-tension 38mN/m
    """
    from .analysis import analyse_to, figure_formats as formats_of

    try:
        formats = formats_of(figure_formats)
    except ValueError as exc:
        raise FriendlyError(f"--figures: {exc}.") from None
    options = parse_analysis_options(values)
    result = analyse_to(source, out_dir, options, figures=formats)
    click.echo(summary_text(result, out_dir))


def summary_text(result, out_dir) -> str:
    """A few human lines of a :class:`~thinning.result.Result` in the house style
    (:mod:`thinning.display`): λ with its interval, regime, quality, warnings."""
    from . import display

    c = result.characterisation
    time = display.time_unit(c.relaxation_time_s, c.breakup_time_s)
    clock = " (the file's clock)" if result.clock is not None and result.clock.source == "file" else ""
    lines = [f"{result.source.path}: {result.source.n_frames} frames at "
             f"{display.frame_rate(result.calibration.fps_hz)}{clock}, "
             f"{display.given(result.calibration.pixel_size_m, display.UM)} per pixel"]
    if c.relaxation_time_s is not None:
        lines.append("  relaxation time      "
                     + display.with_interval(c.relaxation_time_s, c.relaxation_time_ci95_s, time))
    else:
        lines.append("  relaxation time      — (no elasto-capillary stretch located)")
    lines.append(f"  regime               {c.regime}")
    if c.shear_viscosity_Pa_s is not None:
        lines.append("  shear viscosity      " + display.with_interval(
            c.shear_viscosity_Pa_s, c.interval("shear_viscosity_Pa_s"),
            display.viscosity_unit(c.shear_viscosity_Pa_s)))
    if c.extensional_viscosity_max_Pa_s is not None:
        lines.append("  ext. viscosity max   " + display.with_interval(
            c.extensional_viscosity_max_Pa_s, c.interval("extensional_viscosity_max_Pa_s"),
            display.viscosity_unit(c.extensional_viscosity_max_Pa_s)))
    faded = " (lower bound: the thread faded first)" if c.breakup_seen == "faded" else ""
    lines.append(f"  breakup time         {display.quantity(c.breakup_time_s, time)}{faded}")
    lines.append(f"  quality              {result.quality}")
    for code, warning in zip(result.warning_codes, result.warnings):
        lines.append(f"  warning [{code}]: {warning}")
    lines.append(f"  written to {out_dir}")
    return "\n".join(lines)


def environment_error_text(exc: OSError) -> str:
    """One sentence for a failure of the user's environment (disk, permissions, names)."""
    where = f" ({exc.filename})" if exc.filename else ""
    what = exc.strerror or str(exc)
    if exc.errno in FULL_DISK_ERRNOS:
        return (f"{what}{where}: the disk or quota holding the output is full; free space (or choose "
                "another --out) and run again: results already written are unchanged.")
    if exc.errno in NO_WRITE_ERRNOS:
        return f"{what}{where}: the tool may not write there; choose another --out."
    return f"{what}{where}."


def main(argv=None):
    """Entry point: run the CLI with exit statuses 0 / 1 / 2."""
    try:
        # not click's standalone mode: that turns Ctrl-C into "Aborted!" and exit status 1
        status = cli.main(args=argv, prog_name="thinning", standalone_mode=False)
    except SystemExit:
        raise
    except (KeyboardInterrupt, click.exceptions.Abort):
        signal.signal(signal.SIGINT, signal.SIG_IGN)  # a second Ctrl-C must not cut the clean-up
        click.echo("thinning: interrupted.", err=True)
        sys.exit(130)
    except click.exceptions.Exit as exc:
        sys.exit(exc.exit_code)
    except click.ClickException as exc:
        exc.show()
        sys.exit(exc.exit_code)
    except OSError as exc:  # the user's environment: a full disk, a read-only or missing folder
        click.echo(f"thinning: {environment_error_text(exc)}", err=True)
        sys.exit(2)
    except Exception as exc:  # internal error: one line, exit 1; THINNING_DEBUG=1 for the traceback
        if os.environ.get("THINNING_DEBUG"):
            raise
        click.echo(f"thinning: internal error: {type(exc).__name__}: {exc} "
                   "(set THINNING_DEBUG=1 for details).", err=True)
        sys.exit(1)
    sys.exit(status if isinstance(status, int) else 0)


if __name__ == "__main__":
    main()
