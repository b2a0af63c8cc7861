"""Data-parallel natural gradient on ``torch.distributed``: shared statistics, sharded inversions.

``share_curvature(opt)`` attaches a :class:`CurvatureCommunicator` to a
:class:`~ngopt.FisherDescent` (``opt.communicator``).  From then on, on every
rank of the process group:

* **statistics** — when a refresh is due, every block's batch statistics (this
  step's, before the running average) are packed into one flat buffer and
  averaged with a single ``all_reduce``.  Kronecker factors are symmetric, so
  only their upper triangles travel.  Each block carries a count slot: a block
  no rank recorded this step stays absent; one recorded by only some ranks is
  averaged over those.  Ranks weigh equally, exactly as DDP's gradient average
  does: with equal per-rank batches and a mean-reduced loss the result is the
  whole-batch statistics, ``A = mean_r A_r`` (a mean over rows) and
  ``G = mean_r G_r`` (``G_r = c_r sum g g^T`` with ``c_r = 1/#local terms``).
  With unequal batches it is the curvature of the objective DDP descends,
  ``L = mean_r L_r``, not of the pooled mean loss.
* **inversions** — blocks with inverse tensors of their own (Kronecker blocks)
  are assigned to ranks greedily by cost ``sum d^3`` over their square factors
  (``d_in^3 + d_out^3``); each owner runs ``block.prepare_inverse`` and the
  owners' results, the ``info`` dict included, travel bit for bit in one
  collective of byte buffers (after a tiny all-gather of their sizes).  Every rank
  therefore holds identical inverses and diagnostics.  With
  ``shard_inversions=False`` every rank inverts everything itself: no traffic,
  ``R`` times the compute.  Diagonal blocks are always done locally (their
  "inverse" is the statistic itself).
* **sampled targets** — each rank draws the targets of its own examples from a
  generator seeded by a hash of ``(seed, rank, step)``: a run is reproducible
  for a given world size, seed and data split, and a resumed run repeats the
  uninterrupted run's draws; another world size draws differently (same
  distribution, other numbers).

* **step control** — the KL trust bound and momentum see only shared values
  (averaged gradients, shared curvature).  With ``damping_rule='lm'`` the
  reduction ratio is that of the global batch: the losses before and after
  the step are averaged over the ranks (one tiny all-reduce) and the quadratic
  model's prediction comes from shared values, so every rank computes the same
  ratio up to rounding.  After every Levenberg-Marquardt update the ranks take
  the first rank's damping (one tiny broadcast), so that a ratio rounded to
  either side of a threshold cannot set their damping apart.
* **replicas** — every rank computes its step from the same bits (DDP's averaged
  gradients, the averaged statistics, the owners' inverses), but kernels may round
  it differently in another process (thread count, memory alignment, another
  CPU's instruction set).  The ranks' weights therefore agree to within rounding,
  not bit for bit.  The gap does not feed back (every rank's next step is again
  computed from shared bits), so it is a random walk of rounding errors, up to about
  ``0.5 sqrt(steps) * eps * max|w|`` (``scripts/replica_drift.py``);
  ``resync_every`` resets it to zero by broadcasting the first rank's parameters.

Gradients are averaged by ``DistributedDataParallel`` as usual; plain
``torch.distributed`` code calls :func:`average_gradients` after ``backward()``
(and :func:`sync_parameters` once at the start).

Communication per refresh, for ``R`` ranks and Kronecker blocks of sizes
``(d_in, d_out)``, 4-byte floats (:func:`communication_volume` computes it):

* statistics all-reduce: ``S = 4 * sum_b [d_in(d_in+1)/2 + d_out(d_out+1)/2 + 1]``
  bytes; a ring all-reduce sends and receives ``2 (R-1)/R * S`` per rank;
* inverse exchange (sharded): payload ``P = 4 * sum_b (d_in^2 + d_out^2)``,
  ``P_r`` of it from owner ``r``; an all-gather of buffers padded to the largest
  moves ``(R-1) max_r P_r`` into each rank (``~ P (R-1)/R`` when balanced), an
  all-reduce of the zero-filled concatenation ``2 (R-1)/R * P``; the cheaper one
  is used (all-gather for 2 ranks, all-reduce once ranks outnumber the large
  blocks, because then ``max_r P_r`` stops shrinking while ``R`` grows);
* replicated inversions: no bytes, every rank computes ``sum_b (d_in^3 + d_out^3)``.

Every rank keeps all factors and inverses, ``2 * 4 * sum_b (d_in^2 + d_out^2)``
bytes, whatever ``R``.

Failures: every collective is waited on with the communicator's ``timeout``
(default: the process group's); a peer that exited, raised or stalls makes
the others raise :class:`CurvatureSyncError` naming the step and the exchange.
An exception inside an owner's inversion is sent to all ranks, which all raise it.

Files: ``communicator.py`` (``share_curvature`` and the two calls the optimizer makes),
``wire.py`` (flat statistics buffers, inverse payloads), ``costs.py`` (bytes per exchange,
owners of the inversions), ``sampling.py`` (per-rank targets), ``data_parallel.py`` (helpers
for loops without DDP), ``collectives.py`` (timeouts and the error naming a failed exchange).

The optimizer is used only through its public surface (``steps_taken``,
``statistics_due()``, ``seed``, ``sample_targets_with()``, ``blocks``,
``register_step_post_hook``); importing this package sets
``FisherDescent.attach_data_parallel``, which makes an optimizer built on a DDP
model share its curvature by itself.
"""
from __future__ import annotations

from .collectives import CurvatureSyncError
from .communicator import CurvatureCommunicator, share_curvature
from .costs import assign_owners, cheaper_inverse_collective, communication_volume, inverse_exchange_bytes, \
    inversion_cost
from .data_parallel import average_gradients, max_parameter_difference, save_on_rank0, sync_parameters
from .sampling import RankSampler, rank_step_seed
from .wire import StatisticsBucket, decode_inverses, encode_inverses

__all__ = ["share_curvature", "CurvatureCommunicator", "CurvatureSyncError", "average_gradients", "sync_parameters",
           "max_parameter_difference", "save_on_rank0", "communication_volume", "inverse_exchange_bytes",
           "cheaper_inverse_collective", "assign_owners", "inversion_cost", "rank_step_seed", "RankSampler",
           "StatisticsBucket", "encode_inverses", "decode_inverses"]
