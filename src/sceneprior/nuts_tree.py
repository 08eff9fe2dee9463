"""NUTS trees with two more no-U-turn checks at every merge of two sibling subtrees.

numpyro's NUTS (0.22; multinomial, iterative tree building with checkpoints) stops a
trajectory when the U-turn criterion fails between the two ends of a subtree. On a
well-preconditioned, near-Gaussian posterior whose leapfrog period is close to a power of
two in steps, the two ends of every subtree meet again and the criterion never fails: the
trajectory runs round its orbit up to the maximum tree depth (measured on the 32² Matérn
3/2 LGCP: one chain in four took 295 leapfrog steps per draw against 31 for the others,
``models.lgcp.STEP_SIZE_JITTER`` has the scan of step sizes). The remedy checks, at each
merge of a left subtree L and a right subtree R into one, the criterion also on

    L plus the first state of R   (ends: first state of L, first state of R), and
    the last state of L plus R    (ends: last state of L, last state of R),

whose spans are not whole periods when L ∪ R is. The idea is the extra check of Stan's NUTS
(src/stan/mcmc/hmc/nuts/base_nuts.hpp; from memory, release not checked), adapted here to
numpyro's criterion, which subtracts half of the two end momenta from the sum (Betancourt
2017, "A conceptual introduction to Hamiltonian Monte Carlo", appendix A.4.2, as numpyro's
source cites it), and placed inside numpyro's tree builder: at
the top-level doubling (:func:`_double_tree`) and inside each new subtree, where numpyro's
checkpoints hold the first state and running momentum sum of every subtree that ends at
the current leaf; the last state of a left half is kept beside them (``r_prev_ckpts``).

Validity: the checks are functions of a subtree's states, applied at every merge of the
binary tree whether that merge is a top-level doubling or inside a new subtree, so the
set of trees on which sampling stops is the same from every starting state of the final
tree — the condition NUTS's reversibility rests on (Hoffman & Gelman 2014, §3; from
memory). They only ever stop a trajectory earlier.

Switch: numpyro's ``hmc_util._double_tree`` is replaced by :func:`_double_tree`, which runs
numpyro's own function unless :func:`extra_checks` is active in this thread while the
transition is traced — so plain ``numpyro.infer.NUTS`` anywhere in the process is
unchanged, and a kernel asks for the checks by tracing its transition inside ``with
extra_checks():`` (``inference._tuned_nuts``). Written against numpyro 0.22 (pinned in
pyproject.toml); :func:`install` refuses internals whose parameters differ.
"""

from __future__ import annotations

import contextlib
import threading

import jax
import jax.numpy as jnp
from jax import random
from jax.flatten_util import ravel_pytree
from numpyro.infer import hmc_util as _hu
from numpyro.util import cond, identity, while_loop

__all__ = ["extra_checks", "install"]

_SWITCH = threading.local()  # .active: the trace-time switch, per thread (see the module docstring)
_NUMPYRO_DOUBLE_TREE = _hu._double_tree


@contextlib.contextmanager
def extra_checks():
    """Within this context, NUTS transitions traced by numpyro's tree builder use the
    extra checks."""
    install()
    before = getattr(_SWITCH, "active", False)
    _SWITCH.active = True
    try:
        yield
    finally:
        _SWITCH.active = before


#: the numpyro internals this module calls, replaces or mirrors (``_iterative_build_subtree``
#: in :func:`_build_subtree`, ``_is_iterative_turning`` inside :func:`_subtrees_turning`), with
#: their parameters (numpyro 0.22): a release that
#: changes them must be read against this module before it is used
_EXPECTED = {
    "_double_tree": ("current_tree", "vv_update", "kinetic_fn", "inverse_mass_matrix", "step_size", "going_right",
                     "rng_key", "energy_current", "max_delta_energy", "r_ckpts", "r_sum_ckpts"),
    "_combine_tree": ("current_tree", "new_tree", "inverse_mass_matrix", "going_right", "rng_key",
                      "biased_transition"),
    "_build_basetree": ("vv_update", "kinetic_fn", "z", "r", "z_grad", "inverse_mass_matrix", "step_size",
                        "going_right", "energy_current", "max_delta_energy"),
    "_iterative_build_subtree": ("prototype_tree", "vv_update", "kinetic_fn", "inverse_mass_matrix", "step_size",
                                 "going_right", "rng_key", "energy_current", "max_delta_energy", "r_ckpts",
                                 "r_sum_ckpts"),
    "_is_iterative_turning": ("inverse_mass_matrix", "r", "r_sum", "r_ckpts", "r_sum_ckpts", "idx_min", "idx_max",
                              "unravel_fn"),
    "_is_turning": ("inverse_mass_matrix", "r_left", "r_right", "r_sum"),
    "_leaf_idx_to_ckpt_idxs": ("n",),
    "_get_leaf": ("tree", "going_right"),
}


def install() -> None:
    """Route numpyro's doubling step through :func:`_double_tree` (idempotent); refuses a
    numpyro whose tree-building internals differ from those this module was written against."""
    import inspect

    import numpyro

    for name, params in _EXPECTED.items():
        fn = _NUMPYRO_DOUBLE_TREE if name == "_double_tree" else getattr(_hu, name, None)
        if fn is None or tuple(inspect.signature(fn).parameters) != params:
            raise RuntimeError(f"numpyro {numpyro.__version__}: hmc_util.{name} is not the function "
                               "sceneprior/nuts_tree.py extends (written against numpyro 0.22): install numpyro "
                               "0.22, or set sceneprior.models.lgcp.EXTRA_UTURN_CHECKS = False")
    _hu._double_tree = _double_tree


def _tree_where(pred, a, b):
    return jax.tree.map(lambda x, y: jnp.where(pred, x, y), a, b)


def _double_tree(current_tree, vv_update, kinetic_fn, inverse_mass_matrix, step_size, going_right, rng_key,
                 energy_current, max_delta_energy, r_ckpts, r_sum_ckpts):
    """numpyro's ``_double_tree`` (same arguments and result), with the extra checks when
    :func:`extra_checks` is active: on the new subtree's internal merges, and on the merge
    of the current tree with it."""
    if not getattr(_SWITCH, "active", False):
        return _NUMPYRO_DOUBLE_TREE(current_tree, vv_update, kinetic_fn, inverse_mass_matrix, step_size, going_right,
                                    rng_key, energy_current, max_delta_energy, r_ckpts, r_sum_ckpts)
    key, transition_key = random.split(rng_key)
    new_tree = _build_subtree(current_tree, vv_update, kinetic_fn, inverse_mass_matrix, step_size, going_right,
                              key, energy_current, max_delta_energy, r_ckpts, r_sum_ckpts)
    tree = _hu._combine_tree(current_tree, new_tree, inverse_mass_matrix, going_right, transition_key, True)
    # (first, last, sum) momenta of the left and the right part of the merged tree
    cur = (current_tree.r_left, current_tree.r_right, current_tree.r_sum)
    new = (new_tree.r_left, new_tree.r_right, new_tree.r_sum)
    l_first, l_last, l_sum = _tree_where(going_right, cur, new)
    r_first, r_last, r_sum = _tree_where(going_right, new, cur)
    add = lambda a, b: jax.tree.map(jnp.add, a, b)  # noqa: E731
    left_plus = _hu._is_turning(inverse_mass_matrix, l_first, r_first, add(l_sum, r_first))
    plus_right = _hu._is_turning(inverse_mass_matrix, l_last, r_last, add(r_sum, l_last))
    return tree._replace(turning=tree.turning | left_plus | plus_right)


def _subtrees_turning(inverse_mass_matrix, r, r_sum, r_ckpts, r_sum_ckpts, r_prev_ckpts, idx_min, idx_max,
                      unravel_fn, halves: bool = True):
    """Whether some subtree that ends at the current leaf n turns, in one loop over the
    checkpoints (largest subtree last; stops at the first that turns): checkpoint i holds
    the first leaf a of such a subtree (momentum r_a, running sum S(a)); the subtree's own
    ends are checked as numpyro's ``_is_iterative_turning`` checks them (sum S(n) − S(a) +
    r_a), and for subtrees of four or more leaves (i < idx_max: checkpoint i + 1 holds the
    first leaf m + 1 of the right half, r_prev_ckpts[i + 1] the leaf m before it) also
      left half + leaf m+1:  ends r_a, r_{m+1};  sum S(m+1) − S(a) + r_a
      leaf m + right half:   ends r_m, r_n;      sum S(n) − S(m+1) + r_{m+1} + r_m.
    ``halves`` False: the subtrees' own ends only (for tests)."""
    last = r_ckpts.shape[0] - 1

    def body(state):
        i, _ = state
        whole = _hu._is_turning(inverse_mass_matrix, unravel_fn(r_ckpts[i]), unravel_fn(r),
                                unravel_fn(r_sum - r_sum_ckpts[i] + r_ckpts[i]))
        if not halves:
            return i - 1, whole
        j = jnp.minimum(i + 1, last)  # i + 1 ≤ idx_max whenever it is used
        first_sum = r_sum_ckpts[j] - r_sum_ckpts[i] + r_ckpts[i]
        t1 = _hu._is_turning(inverse_mass_matrix, unravel_fn(r_ckpts[i]), unravel_fn(r_ckpts[j]),
                             unravel_fn(first_sum))
        last_sum = r_sum - r_sum_ckpts[j] + r_ckpts[j] + r_prev_ckpts[j]
        t2 = _hu._is_turning(inverse_mass_matrix, unravel_fn(r_prev_ckpts[j]), unravel_fn(r), unravel_fn(last_sum))
        return i - 1, whole | ((i < idx_max) & (t1 | t2))

    _, turning = while_loop(lambda it: (it[0] >= idx_min) & ~it[1], body, (idx_max, jnp.array(False)))
    return turning


def _build_subtree(prototype_tree, vv_update, kinetic_fn, inverse_mass_matrix, step_size, going_right, rng_key,
                   energy_current, max_delta_energy, r_ckpts, r_sum_ckpts, halves: bool = True):
    """A new subtree of 2^depth leaves, as numpyro's ``_iterative_build_subtree`` builds it
    (the same leaves, multinomial proposals and checkpoints), its checkpoint checks with the
    extra ones in one loop (:func:`_subtrees_turning`), and the checkpoint of the leaf before
    each checkpointed one. ``halves`` False: without the extra checks (for tests)."""
    max_num_proposals = 2**prototype_tree.depth
    r_prev_ckpts = jnp.zeros_like(r_ckpts)
    r_prev0 = jnp.zeros(r_ckpts.shape[1:], r_ckpts.dtype)

    def cond_fn(state):
        tree, turning = state[0], state[1]
        return (tree.num_proposals < max_num_proposals) & ~turning & ~tree.diverging

    def body_fn(state):
        current_tree, _, r_ckpts, r_sum_ckpts, r_prev_ckpts, r_prev, rng_key = state
        rng_key, transition_rng_key = random.split(rng_key)
        z, r, z_grad = _hu._get_leaf(current_tree, going_right)
        new_leaf = _hu._build_basetree(vv_update, kinetic_fn, z, r, z_grad, inverse_mass_matrix, step_size,
                                       going_right, energy_current, max_delta_energy)
        new_tree = cond(current_tree.num_proposals == 0, new_leaf, identity,
                        (current_tree, new_leaf, inverse_mass_matrix, going_right, transition_rng_key),
                        lambda x: _hu._combine_tree(*x, False))
        leaf_idx = current_tree.num_proposals
        idx_min, idx_max = _hu._leaf_idx_to_ckpt_idxs(leaf_idx)
        r_flat, unravel_fn = ravel_pytree(new_leaf.r_right)
        r_sum_flat, _ = ravel_pytree(new_tree.r_sum)
        r_ckpts, r_sum_ckpts, r_prev_ckpts = cond(
            leaf_idx % 2 == 0, (r_ckpts, r_sum_ckpts, r_prev_ckpts),
            lambda x: (x[0].at[idx_max].set(r_flat), x[1].at[idx_max].set(r_sum_flat), x[2].at[idx_max].set(r_prev)),
            (r_ckpts, r_sum_ckpts, r_prev_ckpts), identity)
        turning = _subtrees_turning(inverse_mass_matrix, r_flat, r_sum_flat, r_ckpts, r_sum_ckpts, r_prev_ckpts,
                                    idx_min, idx_max, unravel_fn, halves=halves)
        return new_tree, turning, r_ckpts, r_sum_ckpts, r_prev_ckpts, r_flat, rng_key

    basetree = prototype_tree._replace(num_proposals=0)
    tree, turning, *_ = while_loop(cond_fn, body_fn, (basetree, jnp.array(False), r_ckpts, r_sum_ckpts,
                                                      r_prev_ckpts, r_prev0, rng_key))
    return tree._replace(depth=prototype_tree.depth, turning=turning)
