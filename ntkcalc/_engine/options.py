"""Names of the choices a caller makes, and the shape each outputs mode returns."""

from __future__ import annotations

from typing import Literal, get_args

Method = Literal["auto", "structured", "jacobian", "jvp"]
Outputs = Literal["full", "trace", "diagonal", "logit-sum"]

METHODS: tuple[str, ...] = get_args(Method)
OUTPUTS: tuple[str, ...] = get_args(Outputs)

# The matrix-free operator (`ntk_operator`): its square outputs modes, and how it applies Θ.
OperatorOutputs = Literal["trace", "full", "logit-sum"]
ProductMethod = Literal["auto", "products", "factors"]
OPERATOR_OUTPUTS: tuple[str, ...] = get_args(OperatorOutputs)
PRODUCT_METHODS: tuple[str, ...] = get_args(ProductMethod)

OUTPUTS_DOC = """\
- ``"full"``: (N1, N2, O, O), every pair of outputs;
- ``"trace"``: (N1, N2), Σ_a K[:, :, a, a];
- ``"diagonal"``: (N1, N2, O), K[:, :, a, a];
- ``"logit-sum"``: (N1, N2), the kernel of Σ_a f_a (Mohamadi, Bae & Sutherland, ICML 2023,
  arXiv:2206.12543)."""


def check_choice(name: str, value, allowed: tuple[str, ...]) -> str:
    """Return ``value`` if it is one of ``allowed``, else raise a ValueError naming the argument."""
    if not isinstance(value, str) or value not in allowed:
        raise ValueError(
            f"`{name}`={value!r} is not known: use one of {', '.join(map(repr, allowed))}."
        )
    return value


def tile_shape(outputs: str, b1: int, b2: int, num_outputs: int) -> tuple[int, ...]:
    """Shape of one kernel tile of ``b1 × b2`` examples in this outputs mode."""
    if outputs == "full":
        return (b1, b2, num_outputs, num_outputs)
    if outputs == "diagonal":
        return (b1, b2, num_outputs)
    return (b1, b2)


def basis_size(outputs: str, num_outputs: int) -> int:
    """How many output directions each example is differentiated along (A in the docs)."""
    return 1 if outputs == "logit-sum" else num_outputs
