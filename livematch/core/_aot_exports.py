"""The kernels compiled ahead of time, with their signatures (generated).

Written by ``python -m livematch._aot_build --exports`` from what the
service's warm-up compiles under numba's JIT on an empty cache;
``tests/test_aot_kernels.py`` checks that every kernel the JIT compiles is
here with the same signatures. ``module:qualname`` -> its signatures, each
(return type, argument types) in ``numba.types`` names
(:func:`livematch._aot_build.parse`); a call from Python takes the
first signature that fits its arguments.
"""

from __future__ import annotations

EXPORTS: dict[str, tuple[tuple[str, tuple[str, ...]], ...]] = {
    'livematch.core._chain_kernel:_keyed_chain_rows.<locals>.chain_rows': (('int64', ("Array(int32, 1, 'C')", "Array(float64, 2, 'C')", 'int64', 'int64', "Array(int64, 1, 'C')", "Array(float64, 1, 'C')")),),
    'livematch.core._fix_kernel:all_within': (('boolean', ("Array(float64, 2, 'C')", 'int64', 'int64', 'float64', 'float64', 'float64')),),
    'livematch.core._route_kernel:_less': (('boolean', ('float64', 'int64', 'int64', 'int64', 'float64', 'int64', 'int64', 'int64')), ('boolean', ('float64', 'int64', 'int64', 'int64', 'float64', 'int64', 'int64', 'int64'))),
    'livematch.core._route_kernel:_push': (('none', ("Array(float64, 1, 'C')", "Array(int64, 1, 'C')", "Array(int64, 1, 'C')", "Array(float64, 1, 'C')", 'int64', 'int64', 'float64', 'int64', 'int64', 'int64', 'float64')), ('none', ("Array(float64, 1, 'C')", "Array(int64, 1, 'C')", "Array(int64, 1, 'C')", "Array(float64, 1, 'C')", 'int64', 'int64', 'float64', 'int64', 'int64', 'int64', 'float64')), ('none', ("Array(float64, 1, 'C')", "Array(int64, 1, 'C')", "Array(int64, 1, 'C')", "Array(float64, 1, 'C')", 'int64', 'int64', 'float64', 'int64', 'int64', 'int64', 'float64')), ('none', ("Array(float64, 1, 'C')", "Array(int64, 1, 'C')", "Array(int64, 1, 'C')", "Array(float64, 1, 'C')", 'int64', 'int64', 'float64', 'int64', 'int64', 'int64', 'float64'))),
    'livematch.core._route_kernel:route_kernel': (("Tuple((Array(float64, 1, 'C'), Array(int64, 1, 'C'), int64, ))", ("Array(float64, 1, 'C')", "Array(int64, 1, 'C')", "Array(uint8, 1, 'C')", "Array(float64, 1, 'C')", "Array(int32, 1, 'C')", "Array(float64, 1, 'C')", "Array(float64, 1, 'C')", "Array(int64, 1, 'C')", "Array(int64, 1, 'C')")),),
    'livematch.core._sweep_kernel:_before': (('boolean', ('float64', 'float64', 'int64', 'float64', 'float64', 'int64')), ('boolean', ('float64', 'float64', 'int64', 'float64', 'float64', 'int64'))),
    'livematch.core._sweep_kernel:ancestor_at': (('int64', ("Array(int32, 1, 'C')", 'int64', 'int64')),),
    'livematch.core._sweep_kernel:block_ancestor': (('int64', ("Array(int32, 1, 'C')", 'int64')),),
    'livematch.core._sweep_kernel:commit_point': (('int64', ("Array(int32, 1, 'C')", 'int64', 'int64')),),
    'livematch.core._sweep_kernel:commit_point_of': (('int64', ("Array(int32, 1, 'C')", 'int64', 'int64', 'int64')),),
    'livematch.core._sweep_kernel:compact': (("Array(int32, 1, 'C')", ("Array(int32, 1, 'C')", 'int64', 'int64', 'int64', 'int64')),),
    'livematch.core._sweep_kernel:compact_append': (('int64', ("Array(int32, 1, 'C')", "Array(int32, 1, 'C')", 'int64', "Array(float64, 1, 'C')", "Array(int64, 1, 'C')", 'int64', 'float64', 'int64', 'int64')),),
    'livematch.core._sweep_kernel:compact_into': (('none', ("Array(int32, 1, 'C')", "Array(int32, 1, 'C')", 'int64', 'int64')),),
    'livematch.core._sweep_kernel:compact_kept': (('none', ("Array(int32, 1, 'C')", "Array(int32, 1, 'C')", 'int32', 'int32', "Array(boolean, 1, 'C')")), ('none', ("Array(int32, 1, 'C')", "Array(int32, 1, 'C')", 'int64', 'int64', "Array(boolean, 1, 'C')"))),
    'livematch.core._sweep_kernel:count_kept': (('UniTuple(int64, 3)', ("Array(int32, 1, 'C')", "Array(boolean, 1, 'C')")),),
    'livematch.core._sweep_kernel:cut_and_check': (('int64', ("Array(int32, 1, 'C')", 'int64', 'int64', 'boolean')),),
    'livematch.core._sweep_kernel:cut_links': (('none', ("Array(int32, 1, 'C')", 'int64')),),
    'livematch.core._sweep_kernel:floats': (("Array(float64, 1, 'C')", ("Array(int32, 1, 'C')",)),),
    'livematch.core._sweep_kernel:free_interval': (('UniTuple(float64, 2)', ('float64', 'float64', 'float64', 'float64', 'float64', 'float64', 'float64')),),
    'livematch.core._sweep_kernel:kept_mask': (("Array(boolean, 1, 'C')", ("Array(int32, 1, 'C')",)),),
    'livematch.core._sweep_kernel:kept_rows': (('UniTuple(int64, 3)', ("Array(int32, 1, 'C')",)),),
    'livematch.core._sweep_kernel:layout': (('UniTuple(int64, 6)', ('int64', 'int64', 'int64', 'int64', 'int64', 'int64')),),
    'livematch.core._sweep_kernel:live_room': (('int64', ('int64', 'int64')), ('int64', ('int64', 'int64'))),
    'livematch.core._sweep_kernel:mark_ancestors': (('none', ("Array(int32, 1, 'C')", "Array(boolean, 1, 'C')")),),
    'livematch.core._sweep_kernel:row_spare': (('int64', ('int64', 'int64')),),
    'livematch.core._sweep_kernel:rows_ancestor': (('int64', ("Array(int32, 1, 'C')", "Array(int64, 1, 'C')", 'int64', 'int64')), ('int64', ("Array(int32, 1, 'C')", "Array(int64, 1, 'C')", 'int64', 'int64')), ('int64', ("Array(int32, 1, 'C')", "Array(int64, 1, 'C')", 'int64', 'int64'))),
    'livematch.core._sweep_kernel:rows_ancestor_marked': (('int64', ("Array(int32, 1, 'C')", "Array(int64, 1, 'C')", 'int64', 'int64', "Array(int64, 1, 'C')")),),
    'livematch.core._sweep_kernel:seq_at': (('int64', ("Array(int32, 1, 'C')", 'int64')),),
    'livematch.core._sweep_kernel:step_arc': (('float64', ("Array(float64, 1, 'C')", "Array(int64, 1, 'C')", 'int64', 'int64', 'int64', 'float64', 'int64', 'float64')),),
    'livematch.core._sweep_kernel:step_mask': (("Array(boolean, 1, 'C')", ("Array(int32, 1, 'C')", "Array(int64, 1, 'C')", 'int32')), ("Array(boolean, 1, 'C')", ("Array(int32, 1, 'C')", "Array(int64, 1, 'C')", 'int64'))),
    'livematch.core._sweep_kernel:step_parents': (('none', ("Array(int64, 1, 'C')", 'int32', "Array(boolean, 1, 'C')", 'int32', 'int32')), ('none', ("Array(int64, 1, 'C')", 'int64', "Array(boolean, 1, 'C')", 'int32', 'int32'))),
    'livematch.core._sweep_kernel:sweep_kernel': (('UniTuple(int64, 2)', ("Array(float64, 1, 'C')", "Array(int64, 1, 'C')", "Array(float64, 1, 'C')", "Array(float64, 1, 'C')", "Array(int64, 1, 'C')")),),
    'livematch.core._sweep_kernel:tree_append': (('none', ("Array(float64, 1, 'C')", "Array(int64, 1, 'C')", "Array(int32, 1, 'C')", "Array(float64, 1, 'C')", 'int64', 'float64', 'int32', 'int32')), ('none', ("Array(float64, 1, 'C')", "Array(int64, 1, 'C')", "Array(int32, 1, 'C')", "Array(float64, 1, 'C')", 'int64', 'float64', 'int64', 'int64'))),
    'livematch.core._sweep_kernel:tree_sweep': (('Tuple((int64, int32, int32, ))', ("Array(float64, 1, 'C')", "Array(int64, 1, 'C')", "Array(float64, 1, 'C')", "Array(int64, 1, 'C')", "Array(float64, 1, 'C')", "Array(int32, 1, 'C')", 'int64', 'float64', 'int64', 'int64')),),
    'livematch.core._sweep_kernel:via_base': (('int64', ("Array(int32, 1, 'C')",)),),
    'livematch.core._sweep_kernel:window_best': (('int64', ("Array(float64, 2, 'C')", "Array(float64, 1, 'C')")),),
    'livematch.core._sweep_kernel:window_step': (("Tuple((int64, Array(float64, 2, 'C'), Array(float64, 1, 'C'), ))", ("Array(float64, 1, 'C')", "Array(int64, 1, 'C')", "Array(float64, 1, 'C')", "Array(int64, 1, 'C')", "Array(float64, 1, 'C')", "Array(float64, 2, 'C')", "Array(float64, 1, 'C')")),),
    'livematch.core._tree_kernel:_branch': (('int32', ("Array(int32, 1, 'C')", 'int64', 'int64', 'int64')),),
    'livematch.core._tree_kernel:_guarded': (('boolean', ("Array(int32, 1, 'C')", 'int32', "Array(int32, 1, 'C')")), ('boolean', ("Array(int32, 1, 'C')", 'int64', "Array(int32, 1, 'C')"))),
    'livematch.core._tree_kernel:_keyed_junction_split.<locals>.junction_split': (('int64', ("Array(int32, 1, 'C')", 'int64', 'float64', "Array(float64, 1, 'C')")),),
    'livematch.core._tree_kernel:_keyed_live_answer.<locals>.live_answer': (('UniTuple(int64, 2)', ("Array(float64, 2, 'C')", "Array(int32, 1, 'C')", 'int64', "Array(float64, 2, 'C')", 'int64', 'int64', 'int64', 'float64', 'float64', 'float64', 'float64')),),
    'livematch.core._tree_kernel:_keyed_trim.<locals>.trim': (('UniTuple(int64, 3)', ("Array(int32, 1, 'C')", 'int64', 'int64', 'int64', 'int64', 'int64')),),
    'livematch.core._tree_kernel:_still_on': (('boolean', ("Array(int32, 1, 'C')", 'int64', 'int64')),),
    'livematch.core._tree_kernel:_worse': (('boolean', ("Array(int32, 1, 'C')", "Array(float64, 1, 'A')", 'int32', 'int32', 'int32', 'int64')),),
    'livematch.core._tree_kernel:beam_live': (('int64', ("Array(int32, 1, 'C')", 'float64', 'int64', 'int64', "Array(int32, 1, 'C')", 'boolean')),),
    'livematch.core._tree_kernel:best_row': (('int64', ("Array(int32, 1, 'C')", 'int64')),),
    'livematch.core._tree_kernel:best_scored': (('int64', ("Array(int32, 1, 'C')", "Array(float64, 1, 'C')", 'int64')), ('int64', ("Array(int32, 1, 'C')", "Array(float64, 1, 'A')", 'int64'))),
    'livematch.core._tree_kernel:descends_from': (('boolean', ("Array(int32, 1, 'C')", 'int32', 'int64')),),
    'livematch.core._tree_kernel:driven_since': (('float64', ("Array(int32, 1, 'C')", "Array(float64, 1, 'C')", 'int64', 'int64')),),
    'livematch.core._tree_kernel:keep_live': (('int64', ("Array(int32, 1, 'C')", "Array(boolean, 1, 'C')")),),
    'livematch.core._tree_kernel:live_scores': (("Array(float64, 1, 'C')", ("Array(float64, 2, 'C')", "Array(int32, 1, 'C')", "Array(float64, 2, 'C')", 'int64', 'int64', 'float64', 'float64', 'float64')),),
    'livematch.core._tree_kernel:own_row_from': (('int64', ("Array(int32, 1, 'C')", 'int64')),),
    'livematch.core._tree_kernel:own_seq_at': (('int64', ("Array(int32, 1, 'C')", 'int64')),),
    'livematch.core._tree_kernel:prune_live': (('int64', ("Array(int32, 1, 'C')", 'int64')),),
    'livematch.core.monitors._fence_kernel:fence_clearance': (('float64', ('float64', 'float64', 'float64', "Array(int64, 1, 'C')", "Array(float64, 1, 'C')")),),
    'livematch.core.monitors._fence_kernel:fence_probe': (('int64', ('float64', 'float64', 'float64', "Array(int64, 1, 'C')", "Array(float64, 1, 'C')", "Array(int64, 1, 'C')")),),
    'livematch.core.monitors._fence_kernel:fence_probe_clear': (('Tuple((int64, float64, ))', ('float64', 'float64', 'float64', "Array(int64, 1, 'C')", "Array(float64, 1, 'C')", "Array(int64, 1, 'C')", 'boolean')),),
    'livematch.core.monitors._route_kernel:_best': (('int64', ("Array(float64, 1, 'C')", 'int64')), ('int64', ("Array(float64, 1, 'C')", 'int64'))),
    'livematch.core.monitors._route_kernel:_entry_points.<locals>.route_advance': (('Tuple((int64, int64, float64, int64, float64, int64, int64, float64, int64, float64, ))', ("Array(float64, 1, 'C')", "Array(int64, 1, 'C')", 'int64', 'int64', "Array(float64, 1, 'C')", "Array(int64, 1, 'C')", "Array(float64, 1, 'C')", "Array(float64, 1, 'C')", 'float64', 'float64', 'float64', 'float64', 'float64', 'float64')),),
    'livematch.core.monitors._route_kernel:_entry_points.<locals>.window_advance': (('Tuple((int64, int64, float64, int64, float64, ))', ("Array(float64, 1, 'C')", "Array(int64, 1, 'C')", "Array(float64, 1, 'C')", "Array(int64, 1, 'C')", "Array(float64, 1, 'C')", "Array(float64, 1, 'C')")),),
    'livematch.core.monitors._route_kernel:_rebase': (('none', ("Array(float64, 1, 'C')", 'int64')), ('none', ("Array(float64, 1, 'C')", 'int64'))),
}
