"""The forms an encoder spec may take, checked without importing torch.

The command line checks a spec's form while it parses options (a usage error, exit 2);
that must not cost the seconds of importing torch, which a warm re-score never needs.
"""

from __future__ import annotations

from invariance.errors import InvarianceError

# The part before the first colon; :mod:`.specs` has one loader per form.
FORMS = ("torchvision", "torchscript", "python", "checkpoint")

FORMS_HINT = (
    "torchvision:NAME, torchvision:NAME@WEIGHTS, torchscript:FILE, python:MODULE:CALLABLE "
    "or checkpoint:FILE"
)


def split_spec(spec) -> tuple[str, str]:
    """``(form, rest)`` of a spec string, the form being one :func:`load_encoder` knows."""
    if not isinstance(spec, str) or ":" not in spec:
        raise InvarianceError(f"encoder spec {spec!r} must look like {FORMS_HINT}")
    kind, rest = spec.split(":", 1)
    if kind not in FORMS:
        raise InvarianceError(f"encoder spec {spec!r}: unknown form {kind!r}; use {FORMS_HINT}")
    return kind, rest
