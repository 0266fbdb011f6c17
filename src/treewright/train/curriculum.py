"""Which sentences each epoch trains on, in which batches, and with which structural bias: the
length curriculum, the memory budget, the annealed edge bias and how long the word-piece
constraint and the partial brackets last. Every answer is a pure function of (config, restart, epoch), which is what
makes resume exact."""

from __future__ import annotations

import torch

from treewright.corpus import length_batches
from treewright.train.config import TrainConfig
from treewright.train.data import MemoryBudget, TrainData
from treewright.train.distributed import StreamedCorpus
from treewright.train.estep import Batch, edge_bias, make_batch
from treewright.word_pieces import TAG_MODE_PIECE_EPOCHS


def restart_seed(seed: int, restart: int) -> int:
    """The random stream of one restart of one run seed. Distinct for every (seed, restart), so
    that runs with neighbouring seeds never share a start (seed + restart would: seed 0's
    restart 1 would be seed 1's restart 0)."""
    return seed * 1_000_003 + restart


class Curriculum:
    """The epochs' batches for `cfg`; `shuffle`: minibatches in a shuffled order."""

    def __init__(self, cfg: TrainConfig, budget: MemoryBudget, shuffle: bool):
        self.cfg = cfg
        self.budget = budget
        self.shuffle = shuffle

    def length_cap(self, epoch: int) -> int | None:
        """The curriculum's length cap at `epoch` (None: no cap)."""
        c = self.cfg.curriculum
        if c.start_length is None:
            return None
        return c.start_length + c.increment * (epoch // c.every_epochs)

    def bias_scale(self, epoch: int) -> float:
        """Strength of the structural bias at `epoch`: 1, falling linearly to 0 at
        `bias.anneal_epochs` (Smith & Eisner 2006 anneal theirs the same way)."""
        n = self.cfg.bias.anneal_epochs
        return 1.0 if n == 0 else max(0.0, 1.0 - epoch / n)

    def pieces_on(self, epoch: int) -> bool:
        """Whether the word-piece constraint applies at `epoch` (`constraints.word_pieces_epochs`;
        null: the whole run on words, `TAG_MODE_PIECE_EPOCHS` on tags)."""
        n = self.cfg.constraints.word_pieces_epochs
        if n is None and self.cfg.data.tag_mode:
            n = TAG_MODE_PIECE_EPOCHS
        return n is None or epoch < n

    def brackets_on(self, epoch: int) -> bool:
        """Whether the partial brackets apply at `epoch` (`constraints.brackets_epochs`; null:
        the whole run)."""
        n = self.cfg.constraints.brackets_epochs
        return n is None or epoch < n

    def same_data(self, epoch: int, other: int) -> bool:
        """Whether epochs `epoch` and `other` train on the same sentences with the same bias and
        constraints."""
        return (self.length_cap(epoch) == self.length_cap(other)
                and self.bias_scale(epoch) == self.bias_scale(other)
                and self.pieces_on(epoch) == self.pieces_on(other)
                and self.brackets_on(epoch) == self.brackets_on(other))

    def epoch_plan(self, ids, restart: int, epoch: int) -> list[list[int]]:
        """Training sentence indices of each batch of `epoch`, in the order they run."""
        cap = self.length_cap(epoch)
        batch_size = self.cfg.train.batch_size
        seed = restart_seed(self.cfg.train.seed, restart) * 100_003 + epoch
        if isinstance(ids, StreamedCorpus):
            return ids.epoch_plan(cap, batch_size, self.shuffle, seed)
        keep = [i for i in range(len(ids)) if (cap is None or len(ids[i]) <= cap)
                and len(ids[i]) <= self.budget.max_length]
        groups = length_batches([len(ids[i]) for i in keep], batch_size,
                                max_cost=self.budget.max_bytes, cost=self.budget.sentence_bytes,
                                shuffle=self.shuffle, seed=seed)
        return [[keep[k] for k in g] for g in groups]

    def batch(self, data: TrainData, indices: list[int], epoch: int,
              dtype: torch.dtype) -> Batch:
        """The engine batch of training sentences `indices` at `epoch`: partial brackets, the
        word-piece constraint and the edge bias as span potentials, the head-word bias as head
        potentials, the arc-length bias as its weight."""
        pieces = data.pieces if self.pieces_on(epoch) else None
        brackets = data.brackets if self.brackets_on(epoch) else None
        batch = make_batch(indices, data.train_ids, brackets, dtype, pieces)
        scale = self.bias_scale(epoch)
        b = self.cfg.bias
        if scale > 0 and (b.right_edge != 0 or b.left_edge != 0):
            pot = edge_bias(batch.lengths, int(batch.ids.shape[1]), scale * b.right_edge,
                            scale * b.left_edge, dtype)
            batch.span_pot = pot if batch.span_pot is None else batch.span_pot + pot
        if scale > 0 and data.head_list is not None:
            # Unknown words (-1) and padding take none (padding never enters a score anyway).
            past = torch.arange(batch.ids.shape[1])[None, :] >= batch.lengths[:, None]
            weights = data.head_list[batch.ids.clamp(min=0)].masked_fill(
                (batch.ids < 0) | past, 0.0)
            batch.head_bias = (weights * scale).to(dtype)
        if scale > 0 and b.arc_length != 0:
            batch.arc_length = scale * b.arc_length
        return batch
