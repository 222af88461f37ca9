"""Is a basis dependent *by construction* — for any data, not just the data at hand?

`zeroline check` must refuse, for example, two `constant` terms, or a polynomial in
temperature centred at 20 next to one centred at 25 *and* a constant (their difference is a
constant). Such collisions hold for every data set, so evaluating the basis on generic,
random sample points and looking for a (numerically) zero singular value finds them without
a catalogue of special cases. A collision that only the actual data cause (a step that is 1
on every sample) is found later, by the fit itself.
"""

from __future__ import annotations

import numpy as np

from zeroline.basis import Basis, Step

YEAR = 365.25 * 86400.0
#: Exactly dependent columns give ratios near 1e-16; generic well-posed bases stay far above.
DEPENDENT_BELOW = 1e-12
SAMPLES = 400


def dependent_terms(basis: Basis, seed: int = 20261201) -> tuple[str, ...]:
    """Names of the columns that collide for any data, or () when the basis is independent."""
    rng = np.random.default_rng(seed)
    steps = [term.at for term in basis.terms if isinstance(term, Step) and term.u.of == "t"]
    epoch = min(steps) - 0.5 * YEAR if steps else 0.0
    t = np.sort(rng.uniform(0.0, max(YEAR, max(steps, default=0.0) - epoch + 0.5 * YEAR), SAMPLES))
    inputs = {name: rng.uniform(1.0, 40.0, SAMPLES) for name in basis.variables}
    with np.errstate(all="ignore"):
        design = basis.with_epoch(epoch).evaluate(t, inputs)
    finite = np.all(np.isfinite(design), axis=1)
    design = design[finite]
    if design.shape[0] <= basis.size:
        return ()  # cannot judge (an expression undefined almost everywhere): leave it to the fit
    norms = np.linalg.norm(design, axis=0)
    names = basis.names
    zero = [names[j] for j in np.nonzero(norms == 0)[0]]
    if zero:
        return tuple(zero)
    _, singular, vt = np.linalg.svd(design / norms, full_matrices=False)
    if singular[-1] > DEPENDENT_BELOW * singular[0]:
        return ()
    weights = np.abs(vt[-1])
    return tuple(names[j] for j in np.nonzero(weights >= 0.1 * weights.max())[0])
