"""What every command shares: error handling, option groups that build options objects,
flag names for library parameters, output checks and writing.

The option groups turn click options into the frozen objects of
:mod:`invariance.options` once, so each command receives ``extraction``, ``scoring``,
``alignment`` or ``gates`` whole.
"""

from __future__ import annotations

import contextlib
import functools
import re
import signal
import sys
import warnings
from dataclasses import fields
from pathlib import Path

import click

from .. import SAFETY_CAUTION
from ..errors import GateFailed, InvalidParameter, InvarianceError
from ..options import OBJECTIVES, AlignmentOptions, ExtractionOptions, Gates, ScoringOptions

ENCODER_HELP = (
    "Encoder spec: torchvision:NAME (random init), torchvision:NAME@WEIGHTS (torchvision weights "
    "from the local hub cache), torchscript:FILE, python:MODULE:CALLABLE or python:FILE.py:CALLABLE, "
    "checkpoint:FILE (from `invariance align`)."
)

EXIT_CODES_HELP = (
    "Exit codes: 0 success; 1 a clear error (bad input, nothing written half-way); "
    "2 usage error (a bad option value); 3 a gate was not met."
)

# Library parameter -> command-line flag, where the flag is not the parameter's name with
# dashes (the library names parameters, the command line names flags).
_FLAGS = {"held_out_fraction": "--held-out", "spec": "--encoder", "cache_dir": "--cache-dir", "layers": "--layer",
          "trusted_code": "--trust-code"}


# C0 and C1 control characters except tab and newline: in a file name they could move the
# cursor, rewrite the screen or set the window title of the user's terminal (ECMA-48).
_CONTROL = re.compile(r"[\x00-\x08\x0b-\x1f\x7f-\x9f]")


def printable(text) -> str:
    """``text`` with control characters shown as ``\\xNN`` instead of sent to the terminal."""
    return _CONTROL.sub(lambda m: f"\\x{ord(m.group()):02x}", str(text))


def say(message="", *, err: bool = False) -> None:
    """``click.echo`` of a printable line: every line the commands print goes through here."""
    click.echo(printable(message), err=err)


def flag_for(parameter: str) -> str:
    """The command-line flag of a library parameter."""
    return _FLAGS.get(parameter, "--" + parameter.replace("_", "-"))


def usage_error(exc: InvalidParameter) -> click.UsageError:
    """A click usage error (exit 2) that names the flag instead of the parameter."""
    flag = flag_for(exc.parameter)
    return click.UsageError(printable(str(exc).replace(f"{exc.parameter}=", f"{flag} ", 1)))


def _warning_printer():
    """A ``warnings.showwarning`` that prints each distinct warning once, as one line on stderr."""
    seen = set()

    def show(message, category, filename, lineno, file=None, line=None):
        text = str(message)
        if text not in seen:
            seen.add(text)
            say(f"warning: {text}", err=True)

    return show


def handle_errors(func):
    """Library errors become one line on stderr and the documented exit code; each warning once.

    A gate that was not met is a result, not an error: its line is printed without
    ``error:`` (the gate lines on stdout say which check failed) and the exit code is 3.
    """

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        try:
            with warnings.catch_warnings():
                warnings.showwarning = _warning_printer()
                return func(*args, **kwargs)
        except InvalidParameter as exc:
            raise usage_error(exc) from None
        except GateFailed as exc:
            say(str(exc).replace("\r", "\\r").replace("\n", "\\n"), err=True)
            sys.exit(exc.exit_code)
        except InvarianceError as exc:
            # one line, even when a file name in the message holds a line break
            say("error: " + str(exc).replace("\r", "\\r").replace("\n", "\\n"), err=True)
            sys.exit(exc.exit_code)
        except KeyboardInterrupt:
            say("interrupted; nothing was written half-way", err=True)
            sys.exit(130)

    return wrapper


@contextlib.contextmanager
def terminate_as_interrupt():
    """Inside the block, SIGTERM (``kill``, a job scheduler's stop) acts as Ctrl-C.

    Python ends on SIGTERM without unwinding, so a folder being built would stay behind as
    a hidden ``.partial`` sibling; as a ``KeyboardInterrupt`` its cleanup runs and the
    command exits 130 with its usual message.
    """
    def interrupt(signum, frame):
        raise KeyboardInterrupt

    try:
        previous = signal.signal(signal.SIGTERM, interrupt)
    except ValueError:  # not the main thread (an embedding application): leave its handling alone
        yield
        return
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


def _option_group(target: str, options: list, build):
    """Add ``options`` to a command and hand it ``target=build(values)`` instead of them."""
    names = [opt_name for opt_name, _ in options]

    def decorator(func):
        @functools.wraps(func)
        def wrapper(*args, **kwargs):
            values = {name: kwargs.pop(name) for name in names}
            try:
                kwargs[target] = build(values)
            except InvalidParameter as exc:
                raise usage_error(exc) from None
            return func(*args, **kwargs)

        for _, option in reversed(options):
            wrapper = option(wrapper)
        return wrapper

    return decorator


def _default_cache_dir():
    from ..pipeline import default_cache_dir

    return default_cache_dir()


def _build_extraction(values) -> ExtractionOptions:
    no_cache = values.pop("no_cache")
    cache_dir = None if no_cache else (values["cache_dir"] or _default_cache_dir())
    return ExtractionOptions(**{**values, "cache_dir": cache_dir})


trust_code_option = click.option(
    "--trust-code", "trusted_code", multiple=True, metavar="python:SPEC",
    help="Code a checkpoint: file may import as its source (repeat for several). A checkpoint made "
         "from python: code is refused unless that exact spec is named here.")


def extraction_options(func):
    """--image-size, --device, --batch-size, --cache-dir, --no-cache, --skip-unpaired."""
    d = ExtractionOptions()
    options = [
        ("image_size", click.option("--image-size", type=int, default=None,
                                    help="Resize images to PX x PX (16-2048; overrides the encoder's own "
                                         "preprocessing).")),
        ("device", click.option("--device", type=click.Choice(["auto", "cpu", "cuda"]), default=d.device,
                                show_default=True, help="Where the encoder runs; auto uses a GPU when present.")),
        ("batch_size", click.option("--batch-size", type=int, default=d.batch_size, show_default=True,
                                    help="Images per forward pass (2-4096).")),
        ("cache_dir", click.option("--cache-dir", type=click.Path(file_okay=False, path_type=Path), default=None,
                                   help="Feature cache folder [default: $INVARIANCE_CACHE or "
                                        "~/.cache/invariance/features].")),
        ("no_cache", click.option("--no-cache", is_flag=True, help="Neither read nor write the feature cache.")),
        ("skip_unpaired", click.option("--skip-unpaired", is_flag=True,
                                       help="Go on without images that have no partner.")),
        ("trusted_code", trust_code_option),
    ]
    return _option_group("extraction", options, _build_extraction)(func)


def scoring_options(*, folds: bool = True, tsne: bool = True):
    """--seed, --permutations and, where the command uses them, --folds and --tsne."""
    d = ScoringOptions()
    options = [
        ("seed", click.option("--seed", type=int, default=d.seed, show_default=True,
                              help="Seed for every split, permutation and subsample.")),
        ("permutations", click.option("--permutations", type=int, default=d.permutations, show_default=True,
                                      help="Paired permutations for the MMD test (1-1000000).")),
    ]
    if folds:
        options.append(("folds", click.option("--folds", type=int, default=d.folds, show_default=True,
                                              help="Grouped folds for the domain classifier (2-50).")))
    if tsne:
        options.append(("tsne", click.option("--tsne", is_flag=True,
                                             help="Add a t-SNE view of the features to the report (slower).")))
    return _option_group("scoring", options, lambda values: ScoringOptions(**values))


GATE_CAUTION = ("Gates decide on the upper end of the 95% interval, check every scored layer, and fail on "
                "collapsed or not computable measures. A passed gate is a regression check, not a safety "
                "function: " + SAFETY_CAUTION)


def gate_options(func):
    """--max-domain-accuracy, --max-relative-drift, --max-probe-gap (help carries the caution)."""
    options = [
        ("max_domain_accuracy", click.option("--max-domain-accuracy", type=float,
                                             help="Gate: exit 3 if the 95% upper end of held-out domain accuracy "
                                                  "is above this (0-1), on any scored layer.")),
        ("max_relative_drift", click.option("--max-relative-drift", type=float,
                                            help="Gate: exit 3 if the 95% upper end of the mean relative drift is "
                                                 "above this, on any scored layer.")),
        ("max_probe_gap", click.option("--max-probe-gap", type=float,
                                       help="Gate: exit 3 if the 95% upper end of any decodable probe's "
                                            "clean-minus-cluttered gap (in its own unit: accuracy or R2) is above "
                                            "this, on any scored layer. " + GATE_CAUTION)),
    ]
    return _option_group("gates", options, lambda values: Gates(**values))(func)


_ALIGNMENT_HELP = {
    "steps": "Training steps (the schedules follow them, so a run is reproducible on any machine).",
    "minutes": "Wall-clock limit for the whole command (caching, training, held-out scoring); training "
               "stops early to fit it and the result says it was cut short [default: none].",
    "train_from": "First stage to train: a top-level block or a dotted submodule path (earlier stages are "
                  "frozen and cached) [default: the earliest stage whose forward costs at most 75 MFLOP per "
                  "image: a small encoder trains whole, ResNet-18 at 64 px from layer4].",
    "held_out_fraction": "Fraction of pairs never trained on; before/after are measured on them (0.05-0.8).",
    "anchor_weight": "Weight of the clean-feature anchor loss.",
    "paired_weight": "Weight of the paired term (the batch's relative cosine drift, as score reports it).",
    "mean_weight": "Weight of the mean-matching loss (whitened distance between the clean and cluttered "
                   "mean features).",
    "task_weight": "Weight of the task heads on clean labels.",
    "learning_rate": "Learning rate (Adam): reached after a linear warm-up over the first tenth of the steps, "
                     "then annealed by the DANN schedule (constant for teacher).",
    "guard_margin": "Stop when a clean probe falls more than this relative margin below its start (0-1).",
    "objective": "Alignment objective: combined (gradient reversal plus paired and mean-matching terms), "
                 "dann (gradient reversal only), paired (paired and mean-matching terms only) or "
                 "teacher (cluttered views pulled onto the original encoder's clean features, task "
                 "heads on both views; it closed the most of the gap on blended digits).",
}


def alignment_options(func):
    """One flag per :class:`AlignmentOptions` field except the batch size (--batch-size sets it)."""
    d = AlignmentOptions()
    options = []
    for f in fields(AlignmentOptions):
        if f.name == "batch_size":
            continue
        value = getattr(d, f.name)
        kind = {"steps": int, "train_from": str, "objective": click.Choice(OBJECTIVES)}.get(f.name, float)
        options.append((f.name, click.option(flag_for(f.name), f.name, type=kind, default=value,
                                             show_default=value is not None,
                                             help=_ALIGNMENT_HELP.get(f.name, f.name.replace("_", " ")))))
    return _option_group("alignment", options, lambda values: AlignmentOptions(**values))(func)


def quiet_option(func):
    return click.option("--quiet", is_flag=True, help="No progress on stderr.")(func)


def json_option(func):
    return click.option("--json", "json_path", type=click.Path(dir_okay=False, path_type=Path),
                        help="Write the result JSON here.")(func)


def report_option(func):
    return click.option("--report", "report_path", type=click.Path(dir_okay=False, path_type=Path),
                        help="Write an HTML report here.")(func)


def check_spec(ctx, param, value):
    """Click callback: an encoder spec of an unknown form is a usage error (exit 2).

    Only the form is checked here; whether its file or module exists is the loader's to say.
    """
    if value is None:
        return value
    from ..encoders.spec_forms import split_spec

    for spec in (value,) if isinstance(value, str) else value:
        try:
            split_spec(spec)
        except InvarianceError as exc:
            raise click.BadParameter(printable(exc)) from None
    return value


def encoder_option(func):
    return click.option("--encoder", "spec", help=ENCODER_HELP, callback=check_spec)(func)


def weights_option(func):
    return click.option("--weights", type=click.Path(dir_okay=False, path_type=Path),
                        help="Local state_dict for a torchvision: spec.")(func)


def check_outputs(outputs: dict, *, data=None, specs=(), files=()):
    """Fail before any work when an output cannot be written, when two outputs are one
    file, or when an output would overwrite something the run reads.

    ``outputs`` maps each output's flag to its path; ``data`` is the data set (its
    labels.csv, or the manifest itself, is an input), ``specs`` the encoder specs (their
    files are inputs) and ``files`` any other file read.
    """
    from .._io import check_distinct_outputs, check_writable

    inputs = [Path(f) for f in files if f is not None]
    if data is not None:
        data = Path(data)
        inputs += [data / "labels.csv"] if data.is_dir() else [data]
    for spec in specs:
        kind, _, rest = str(spec).partition(":")
        if kind in ("checkpoint", "torchscript"):
            inputs.append(Path(rest))
        elif kind == "python" and rest.rpartition(":")[0].endswith(".py"):
            inputs.append(Path(rest.rpartition(":")[0]))
    check_distinct_outputs(outputs, inputs)
    for path in outputs.values():
        if path is not None:
            check_writable(path)


def write_result_outputs(result, *, json_path=None, report_path=None, drift_csv=None, tsne=False):
    """The result JSON, the per-pair drift CSV and the HTML report, written together.

    Everything is rendered first and then moved into place at once
    (:func:`invariance._io.write_outputs_together`): a report that fails to render, or a
    disk that fills up, leaves none of them rather than a JSON without its report.
    """
    from ..results import add_caution

    add_caution(result)
    outputs = []
    if json_path:
        outputs.append((json_path, _json_text(result), "result JSON"))
    if drift_csv:
        outputs.append((drift_csv, drift_table(result.get("pairs", [])), "per-pair drift"))
    if report_path:
        outputs.append((report_path, _report_page([result], tsne=tsne), "report"))
    _write_together(outputs)


def write_comparison_outputs(comparison, *, json_path=None, report_path=None, tsne=False):
    """The comparison JSON and the HTML report of ``compare``, written together (all or none)."""
    from ..results import add_caution

    add_caution(comparison)
    outputs = []
    if json_path:
        outputs.append((json_path, _json_text(comparison), "comparison JSON"))
    if report_path:
        outputs.append((report_path, _report_page(comparison["results"], failures=comparison["failures"],
                                                  warnings=comparison["warnings"], tsne=tsne), "report"))
    _write_together(outputs)


def _json_text(data) -> str:
    from .._io import dumps_json

    return dumps_json(data) + "\n"


def _report_page(results, **kwargs) -> str:
    from ..report import render_report

    return render_report(results, **kwargs)


def _write_together(outputs) -> None:
    from .._io import write_outputs_together

    write_outputs_together([(path, content) for path, content, _ in outputs])
    for path, _, what in outputs:
        say(f"{what}: {path}")


def _inert_cell(text: str) -> str:
    """A text cell a spreadsheet shows as text: one starting with = + - @ or a tab/CR would
    be read as a formula, so it gets a leading apostrophe (OWASP, "CSV Injection")."""
    text = str(text)
    return "'" + text if text[:1] in ("=", "+", "-", "@", "\t", "\r") else text


def drift_table(pairs) -> str:
    """Per-pair drift as CSV text (file, relative_drift); an empty cell where not computable."""
    import csv
    import io

    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(["file", "relative_drift"])
    writer.writerows([_inert_cell(p["name"]), "" if p["drift"] is None else f"{p['drift']:.6f}"] for p in pairs)
    return out.getvalue()
