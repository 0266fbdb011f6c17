"""Data-parallel training on torch.distributed (gloo backend, CPU), one process per worker.

Every worker holds the whole grammar and reads the whole corpus; what is split is the work:

- batch EM, MAP-EM and VB: the epoch's sentences are dealt to the workers balanced by inside
  cost (n^3); each runs the E-step on its share, and the expected counts with the
  log-likelihood are summed by one all-reduce per update, after which every worker applies the
  same M-step and so holds the same grammar;
- online EM: each minibatch is dealt the same way, and its counts summed before the update;
- gradient training: each minibatch is dealt the same way, the workers' gradients of the summed
  log-likelihood are summed by an explicit all-reduce, and every worker takes the same Adam
  step (the loss is divided by the global word count, so the step equals a single process's).

The deal is a pure function of the sentence lengths, so each sentence is used exactly once per
epoch across the workers and every run with the same config sees the same shards.

Processes are started by torchrun (`torch.distributed.run`), which sets RANK, WORLD_SIZE,
MASTER_ADDR and MASTER_PORT; `treewright train CONFIG --workers N` runs that same launcher for
N local processes on loopback (`launch_local`). Only rank 0 writes the run folder.

Ctrl-C reaches only the launcher (torchrun starts each worker in a session of its own), so
the launcher passes it on through the key-value store: it sets STOP_KEY, every worker's
watchdog sees it within a heartbeat and asks its trainer to stop, and the workers agree by an
all-reduce at each step boundary (`any_true`) to stop after the same step, with a checkpoint. A
second Ctrl-C ends the workers at once.

A dead peer must end the job, not hang it: the process group gets a timeout (the longest wait at
one all-reduce), and a watchdog thread in every worker beats a counter in the launcher's
key-value store every second and watches the others'; a worker not heard from for
`distributed.timeout_seconds` ends the job with a message naming its rank.

Streaming (`data.stream_chunk`, online EM): `StreamedCorpus` holds the word ids of one chunk of
the file at a time and `StreamPlan` forms each epoch's minibatches chunk by chunk, so a worker's
memory stays flat as the corpus grows; every worker streams the file and takes its share of
each minibatch.
"""

from __future__ import annotations

import bisect
import datetime
import math
import os
import signal
import socket
import sys
import threading
import time
from collections import Counter
from collections.abc import Sequence as SequenceABC
from dataclasses import dataclass
from typing import Iterator, Mapping, Sequence

import torch
import torch.distributed as dist

from treewright.corpus import CorpusStream, ReadOptions, cubic_cost, length_batches
from treewright.corpus.reader import no_usable_sentence
from treewright.errors import InputError
from treewright.train.estep import ExpectedCounts
from treewright.vocab import Vocabulary

HEARTBEAT_SECONDS = 1.0          # how often each worker beats; far below any sensible timeout
EXIT_PEER_LOST = 3               # exit code of a worker ended by its watchdog
WATCHDOG_PREFIX = "treewright/watchdog/"  # the watchdog's keys in the launcher's store
STOP_KEY = "stop"                # set by the launcher on Ctrl-C: stop after this step


class WorkerLost(RuntimeError):
    """A peer worker died or stopped answering; the message names its rank when known."""


# ---------------------------------------------------------------------------------------------
# Sharding


def balanced_shards(indices: Sequence[int], lengths: Sequence[int] | Mapping[int, int],
                    parts: int) -> list[list[int]]:
    """Deal `indices` (sentence lengths `lengths[i]`) to `parts` workers so that the summed
    inside cost n^3 is balanced: longest-processing-time-first (Graham 1969), costliest sentence
    first (ties: lower index), each to the least-loaded worker (ties: lower rank). Its largest
    load is at most 4/3 of the best possible. Every index lands in exactly one shard; each
    shard keeps the order of `indices`. Deterministic."""
    if parts < 1:
        raise ValueError(f"parts must be >= 1, got {parts}")
    owner: dict[int, int] = {}
    loads = [0] * parts
    for i in sorted(indices, key=lambda i: (-cubic_cost(lengths[i]), i)):
        part = min(range(parts), key=lambda p: (loads[p], p))
        owner[i] = part
        loads[part] += cubic_cost(lengths[i])
    shards: list[list[int]] = [[] for _ in range(parts)]
    for i in indices:
        shards[owner[i]].append(i)
    return shards


# ---------------------------------------------------------------------------------------------
# Worlds: what the trainer calls, the same with one process or many


class LocalWorld:
    """One process: every call is the identity, so the single-process trainer is unchanged."""
    rank = 0
    size = 1

    @property
    def is_main(self) -> bool:
        """True on the worker that writes the run folder (rank 0)."""
        return self.rank == 0

    def shard_epoch(self, plan: list[list[int]], sentences: Sequence[Sequence[int]],
                    batch_size: int) -> list[list[int]]:
        """This worker's batches (of at most `batch_size`) of an EM epoch whose batches are
        `plan`, indices into `sentences` (word ids)."""
        return plan

    def shard_batch(self, group: list[int], sentences: Sequence[Sequence[int]]) -> list[int]:
        """This worker's part of one minibatch (may be empty when the batch is small)."""
        return group

    def sum_counts(self, counts: ExpectedCounts) -> ExpectedCounts:
        """Expected counts and tallies summed over the workers."""
        return counts

    def sum_values(self, values: Sequence[float]) -> list[float]:
        """Scalars summed over the workers (float64)."""
        return list(values)

    def sum_gradients(self, params: Sequence[torch.Tensor]) -> None:
        """Replace each parameter's gradient by its sum over the workers (None counts as 0)."""

    def any_true(self, flag: bool) -> bool:
        """True when `flag` is true on any worker, so that all of them take the same branch."""
        return flag

    def on_stop_request(self, callback) -> None:
        """Call `callback()` (from another thread) when the launcher passes on a Ctrl-C; one
        process has no launcher, and its own SIGINT handler does the same."""

    def close(self, failure: str | None = None) -> None:
        """Leave the group (a no-op for one process); `failure` says why this worker stops
        early, for its peers' message."""


class GlooWorld(LocalWorld):
    """A member of a torch.distributed gloo group set up from torchrun's environment.

    `timeout_seconds`: a peer silent this long ends the job (watchdog). `collective_seconds`:
    the longest wait at one all-reduce (init_process_group's timeout), which must exceed the
    slowest worker's E-step of one update.
    """

    def __init__(self, timeout_seconds: float, collective_seconds: float):
        self.rank = int(os.environ["RANK"])
        self.size = int(os.environ["WORLD_SIZE"])
        dist.init_process_group("gloo", timeout=datetime.timedelta(seconds=collective_seconds))
        self.watchdog = Watchdog(self.rank, self.size, timeout_seconds)
        self.watchdog.start()

    def shard_epoch(self, plan, sentences, batch_size):
        indices = [i for group in plan for i in group]
        lengths = {i: len(sentences[i]) for i in indices}
        mine = balanced_shards(indices, lengths, self.size)[self.rank]
        batches = length_batches([lengths[i] for i in mine], batch_size)
        return [[mine[k] for k in batch] for batch in batches]

    def shard_batch(self, group, sentences):
        lengths = {i: len(sentences[i]) for i in group}
        return balanced_shards(group, lengths, self.size)[self.rank]

    def sum_counts(self, counts):
        # One all-reduce: every tensor and tally packed in float64, so float32 runs sum their
        # log-likelihood and word counts exactly too.
        parts = (counts.root, counts.binary, counts.lexical)
        tallies = torch.tensor([counts.loglik, counts.words, counts.sentences, counts.unparsed],
                               dtype=torch.float64)
        flat = torch.cat([x.reshape(-1).to(torch.float64) for x in parts] + [tallies])
        self._all_reduce(flat)
        out, offset = [], 0
        for x in parts:
            out.append(flat[offset:offset + x.numel()].reshape(x.shape).to(x.dtype))
            offset += x.numel()
        loglik, words, sentences, unparsed = flat[offset:].tolist()
        return ExpectedCounts(*out, loglik, int(words), int(sentences), int(unparsed))

    def sum_values(self, values):
        flat = torch.tensor(list(values), dtype=torch.float64)
        self._all_reduce(flat)
        return flat.tolist()

    def sum_gradients(self, params):
        grads = [torch.zeros_like(p) if p.grad is None else p.grad for p in params]
        flat = torch.cat([g.reshape(-1) for g in grads])
        self._all_reduce(flat)
        offset = 0
        for p, g in zip(params, grads):
            p.grad = flat[offset:offset + g.numel()].reshape(g.shape).clone()
            offset += g.numel()

    def any_true(self, flag):
        votes = torch.tensor([1.0 if flag else 0.0], dtype=torch.float64)
        self._all_reduce(votes)
        return bool(votes.item() > 0)

    def on_stop_request(self, callback):
        self.watchdog.on_stop = callback

    def _all_reduce(self, tensor: torch.Tensor) -> None:
        try:
            dist.all_reduce(tensor)
        except (RuntimeError, dist.DistError) as err:
            raise WorkerLost(self.watchdog.explain(err)) from None

    def close(self, failure: str | None = None) -> None:
        """Tell the peers this worker ended, on purpose (its silence is then no alarm) or with
        `failure` (they end too, naming this rank and the reason), and leave the group."""
        self.watchdog.finish(failure)
        if failure is None:
            dist.destroy_process_group()


class Watchdog(threading.Thread):
    """Beats this worker's counter in the launcher's store every HEARTBEAT_SECONDS and ends the
    process (exit code EXIT_PEER_LOST) once a peer's counter has not moved for
    `timeout_seconds`, or the store itself is unreachable that long. A peer that finished marks
    itself done and is no longer watched. When the launcher sets STOP_KEY, `on_stop` (if set)
    is called once."""

    def __init__(self, rank: int, size: int, timeout_seconds: float):
        super().__init__(name="treewright-watchdog", daemon=True)
        self.rank, self.size, self.timeout_seconds = rank, size, timeout_seconds
        self.address = f"{os.environ['MASTER_ADDR']}:{os.environ['MASTER_PORT']}"
        store = dist.TCPStore(os.environ["MASTER_ADDR"], int(os.environ["MASTER_PORT"]),
                              is_master=False,
                              timeout=datetime.timedelta(seconds=timeout_seconds))
        self.store = dist.PrefixStore(WATCHDOG_PREFIX, store)
        self.on_stop = None
        self.stopped = threading.Event()
        self.lost: str | None = None
        self.found = threading.Event()

    def run(self) -> None:
        now = time.monotonic()
        beats = {r: -1 for r in range(self.size) if r != self.rank}
        heard = {r: now for r in beats}
        store_ok = now
        stop_seen = False
        while not self.stopped.wait(HEARTBEAT_SECONDS):
            now = time.monotonic()
            try:
                self.store.add(f"beat/{self.rank}", 1)
                if not stop_seen and self.on_stop is not None and self.store.check([STOP_KEY]):
                    stop_seen = True
                    self.on_stop()
                for r in list(beats):
                    if self.store.check([f"failed/{r}"]):
                        why = self.store.get(f"failed/{r}").decode("utf-8", "replace")
                        self._fail(f"worker rank {r} failed: {why}")
                    if self.store.check([f"done/{r}"]):
                        del beats[r]
                        continue
                    value = self.store.add(f"beat/{r}", 0)
                    if value != beats[r]:
                        beats[r], heard[r] = value, now
                    elif now - heard[r] > self.timeout_seconds:
                        self._fail(f"worker rank {r} has not been heard from for "
                                   f"{self.timeout_seconds:g} s (it died or hangs)")
                store_ok = now
            except (RuntimeError, dist.DistError):
                if now - store_ok > self.timeout_seconds:
                    self._fail(f"the launcher's store at {self.address} has not answered for "
                               f"{self.timeout_seconds:g} s (the launcher or its machine is "
                               f"gone)")

    def _fail(self, reason: str) -> None:
        self.lost = reason
        self.found.set()
        print(f"treewright train: rank {self.rank}: {reason}; ending this worker",
              file=sys.stderr, flush=True)
        # The main thread may be blocked inside an all-reduce that would wait for the whole
        # collective timeout; leave at once instead.
        os._exit(EXIT_PEER_LOST)

    def explain(self, err: BaseException) -> str:
        """Why an all-reduce failed, naming the lost rank once the heartbeats show it."""
        first = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
        self.found.wait(self.timeout_seconds + 2 * HEARTBEAT_SECONDS)
        who = self.lost or "a peer worker is gone"
        return f"rank {self.rank}: an all-reduce failed ({first}): {who}"

    def finish(self, failure: str | None = None) -> None:
        try:
            if failure is None:
                self.store.set(f"done/{self.rank}", "1")
            else:
                self.store.set(f"failed/{self.rank}", failure)
        except (RuntimeError, dist.DistError):
            pass  # the store is gone with the launcher; nobody is left to warn
        self.stopped.set()
        # Wait for a beat in flight: a thread still inside the store's C++ call when the
        # interpreter shuts down aborts the process (SIGABRT, "terminate called without an
        # active exception"), which once failed a finished two-worker run on a loaded host.
        if threading.current_thread() is not self and self.is_alive():
            self.join(timeout=2 * HEARTBEAT_SECONDS)


@dataclass
class Launch:
    """What `launch_local` ran: the exit code, the failed worker's rank when one failed, and
    whether a Ctrl-C asked the workers to stop."""
    returncode: int
    failed_rank: int | None = None
    message: str = ""
    interrupted: bool = False


def free_port() -> int:
    """A TCP port on 127.0.0.1 that is free now (the OS picks it)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def launch_local(workers: int, module_args: Sequence[str]) -> Launch:
    """Run `python -m treewright <module_args>` in `workers` processes on this machine through
    torchrun's own entry point (static rendezvous on 127.0.0.1, a free port, no restarts: a
    failed worker stops the others and the job).

    The first Ctrl-C (SIGINT) is passed on to the workers through the store (STOP_KEY): they
    stop together after the current step, with a checkpoint, and `interrupted` is set. The
    second ends them at once (returncode 130)."""
    from torch.distributed.elastic.multiprocessing.errors import ChildFailedError
    from torch.distributed.run import get_args_parser, run

    port = free_port()
    parser = get_args_parser()
    options = ["--nnodes", "1", "--nproc-per-node", str(workers), "--node-rank", "0",
               "--master-addr", "127.0.0.1", "--master-port", str(port),
               "--max-restarts", "0", "--monitor-interval", "0.2"]
    # torchrun's launcher would turn SIGINT into a shutdown of the workers: leave it to us.
    # (Older torch releases lack the option; there a Ctrl-C ends the workers at once.)
    passes_on = "--signals-to-handle" in parser._option_string_actions
    if passes_on:
        options += ["--signals-to-handle", "SIGTERM,SIGHUP,SIGQUIT"]
    args = parser.parse_args([*options, "-m", "treewright", *module_args])
    requested = []

    def pass_on(signum, frame):
        if requested:
            raise KeyboardInterrupt
        requested.append(True)
        try:
            store = dist.TCPStore("127.0.0.1", port, is_master=False,
                                  timeout=datetime.timedelta(seconds=5))
            dist.PrefixStore(WATCHDOG_PREFIX, store).set(STOP_KEY, "1")
        except (RuntimeError, dist.DistError):
            raise KeyboardInterrupt from None  # no store yet: the workers have not started
        print("\ninterrupt: the workers stop after this step with a checkpoint (Ctrl-C again "
              "to stop at once)", file=sys.stderr, flush=True)

    on_main = threading.current_thread() is threading.main_thread()
    previous = signal.signal(signal.SIGINT, pass_on) if on_main and passes_on else None
    try:
        run(args)
    except ChildFailedError as err:
        rank, failure = err.get_first_failure()
        how = f"exit code {failure.exitcode}"
        if failure.exitcode < 0:
            how = f"killed by {failure.signal_name()}"
        elif failure.exitcode == EXIT_PEER_LOST:
            how = "ended by its watchdog after losing a peer"
        return Launch(1, rank, f"worker rank {rank} (pid {failure.pid}) failed: {how}; the "
                               f"other workers were stopped", bool(requested))
    except KeyboardInterrupt:
        return Launch(130, None, "stopped at once by a second Ctrl-C", True)
    finally:
        if previous is not None:
            signal.signal(signal.SIGINT, previous)
    return Launch(0, interrupted=bool(requested))


def world_from_env(timeout_seconds: float, collective_seconds: float) -> LocalWorld:
    """A GlooWorld when torchrun started this process (RANK and WORLD_SIZE set), else the
    LocalWorld. Sets one torch thread per worker unless OMP_NUM_THREADS says otherwise."""
    if "RANK" not in os.environ or "WORLD_SIZE" not in os.environ:
        return LocalWorld()
    if "OMP_NUM_THREADS" not in os.environ:
        torch.set_num_threads(1)
    return GlooWorld(timeout_seconds, collective_seconds)


# ---------------------------------------------------------------------------------------------
# Streaming


class StreamedCorpus(SequenceABC):
    """Word ids of a training file read in chunks of `chunk_size` used sentences: a sequence of
    `len` N whose item i is loaded with its chunk (one chunk in memory at a time; reading on
    in file order is cheap, going back re-reads the file from the start).

    Construction makes one counting pass: the vocabulary (from `options`, or built from the
    token counts with min_count and max_vocab), the report, and per chunk a histogram of
    sentence lengths, from which every epoch's plan is sized without reading words.
    """

    def __init__(self, path, fmt: str, options: ReadOptions, chunk_size: int):
        self.options, self.chunk_size = options, chunk_size
        # Too-long sentences are counted in the report, not held: the corpus is streamed
        # because it may not fit in memory.
        self.stream = CorpusStream(path, fmt, options, keep_set_aside=False)
        counts: Counter = Counter()
        self.histograms: list[Counter] = []      # per chunk: sentence length -> sentences
        for chunk in self.stream.chunks(chunk_size):
            for sentence in chunk:
                counts.update(sentence.tokens)
            self.histograms.append(Counter(len(sentence) for sentence in chunk))
        self.report = self.stream.report
        if not self.histograms:
            raise InputError(no_usable_sentence(self.report), path=self.stream.path)
        self.vocabulary = options.vocabulary or Vocabulary.from_counts(
            counts, min_count=options.min_count, max_size=options.max_vocab)
        index, unk_id = self.vocabulary.index, self.vocabulary.unk_id
        unknown = sum(c for w, c in counts.items() if index.get(w, unk_id) == unk_id)
        self.report.vocab_size = len(self.vocabulary)
        self.report.unk_rate = unknown / self.report.tokens if self.report.tokens else 0.0
        self.size = sum(sum(h.values()) for h in self.histograms)
        self._chunks: Iterator | None = None
        self._next_chunk = 0
        self.loaded: tuple[int, list[list[int]]] = (-1, [])   # (chunk index, its word ids)

    def __len__(self) -> int:
        return self.size

    def __getitem__(self, i: int) -> list[int]:
        c, j = divmod(i, self.chunk_size)
        return self.chunk(c)[j]

    def __iter__(self) -> Iterator[list[int]]:
        """Every sentence's ids in file order, in one pass of its own."""
        for chunk in CorpusStream(self.stream.path, self.stream.fmt, self.options,
                                  keep_set_aside=False).chunks(self.chunk_size):
            for sentence in chunk:
                yield self.vocabulary.encode(sentence.tokens)

    def chunk(self, c: int) -> list[list[int]]:
        """Word ids of chunk `c` (0-based), read now unless it is the one held."""
        if self.loaded[0] == c:
            return self.loaded[1]
        if self._chunks is None or c < self._next_chunk:
            self._chunks, self._next_chunk = self.stream.chunks(self.chunk_size), 0
        self.loaded = (-1, [])      # let the old chunk go before reading the next
        while self._next_chunk <= c:
            sentences = next(self._chunks)
            self._next_chunk += 1
        self.loaded = (c, [self.vocabulary.encode(s.tokens) for s in sentences])
        return self.loaded[1]

    def epoch_plan(self, cap: int | None, batch_size: int, shuffle: bool, seed: int
                   ) -> "StreamPlan":
        return StreamPlan(self, cap, batch_size, shuffle, seed)


class StreamPlan(SequenceABC):
    """An epoch's minibatches over a StreamedCorpus (global sentence indices), formed within
    each chunk in file order: `length_batches` of the chunk's sentences of at most `cap` words,
    shuffled (when `shuffle`) with seed + chunk * 1_000_003, so a corpus of one chunk gets the
    very batches of the in-memory plan. Sized from the histograms; a batch is built when asked
    for, reading its chunk."""

    def __init__(self, corpus: StreamedCorpus, cap: int | None, batch_size: int,
                 shuffle: bool, seed: int):
        self.corpus, self.cap, self.batch_size = corpus, cap, batch_size
        self.shuffle, self.seed = shuffle, seed
        kept = [sum(n for length, n in h.items() if cap is None or length <= cap)
                for h in corpus.histograms]
        # length_batches with only a sentence limit cuts ceil(kept / batch_size) batches.
        counts = [math.ceil(k / batch_size) for k in kept]
        self.starts = [0]
        for n in counts:
            self.starts.append(self.starts[-1] + n)
        self.sentences = sum(kept)
        self._groups: tuple[int, list[list[int]]] = (-1, [])

    def __len__(self) -> int:
        return self.starts[-1]

    def __getitem__(self, k: int) -> list[int]:
        if not 0 <= k < len(self):
            raise IndexError(k)
        c = bisect.bisect_right(self.starts, k) - 1
        if self._groups[0] != c:
            ids = self.corpus.chunk(c)
            keep = [j for j in range(len(ids)) if self.cap is None or len(ids[j]) <= self.cap]
            offset = c * self.corpus.chunk_size
            groups = length_batches([len(ids[j]) for j in keep], self.batch_size,
                                    shuffle=self.shuffle, seed=self.seed + c * 1_000_003)
            assert len(groups) == self.starts[c + 1] - self.starts[c]
            self._groups = (c, [[offset + keep[g] for g in group] for group in groups])
        return self._groups[1][k - self.starts[c]]


def plan_sentences(plan: Sequence[Sequence[int]]) -> int:
    """Sentences in an epoch's plan (a StreamPlan says without reading its chunks)."""
    return plan.sentences if isinstance(plan, StreamPlan) else sum(map(len, plan))
