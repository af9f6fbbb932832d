"""A bound table held by the workers of a Dask cluster (dask.distributed), read by the NumPy solver as it
reads a chunked one: each `X @ w`, `X.T @ u`, `X.T @ X` and sum of squares is one distributed reduction
over the row blocks, so the duality gap and the distance certificate come from the same products and are
exactly what they are in memory.

The table is bound first by `chunked_tables.bind_in_chunks` (every check and message as in memory, the
standardization's statistics in the same pass); each worker then reads its blocks of the bound rows from
that scratch file and keeps them in its memory; a pass sends each block what it needs (w, or u's piece of
rows), computes there and brings back one vector a block. The scratch folder must therefore be on a file system the workers
share with this process (`scratch_dir`); on one machine (a LocalCluster) any folder is.

Dask is optional: `pip install "dask[array]" distributed`.
"""

from __future__ import annotations

import contextlib
from typing import Iterator

import numpy as np

from objc.chunked_tables import ChunkedRows, RowTable, centred_block_sums, sampled_block_gram

LOCAL = "local"  # the address that starts a LocalCluster on this machine (processes, loopback only)


# a worker's block of rows: large enough that a pass is a few dozen tasks (a 4 GB table: 64 of them), small
# enough to spread over the workers
CLUSTER_BLOCK_BYTES = 64 << 20


def _read_block(path: str, first: int, last: int, p: int) -> np.ndarray:
    with open(path, "rb") as f:
        f.seek(8 * p * first)
        return np.fromfile(f, dtype=np.float64, count=(last - first) * p).reshape(last - first, p)


# what a worker computes on its own block: module functions, so that workers import them by name
def _times(block, v):
    return block @ v


def _transposed_times(block, u):
    return block.T @ u


def _gram(block):
    return block.T @ block


def _weighted_squares(block, c):
    return np.einsum("ij,ij,i->j", block, block, c)


def _squares(block):
    flat = block.ravel()
    return float(np.dot(flat, flat))


def _centred(block, center, weights):
    return centred_block_sums(block, center, weights)


def _sampled(block, local, root, center):
    return sampled_block_gram(np.array(block[local]), root, center)


def _rows(block, local):
    return np.array(block[local])


def _columns(block, cols):
    return np.array(block[:, cols])


class ClusterRows(RowTable):
    """n x p float64 rows held by a cluster's workers in blocks of `block_rows` (futures of arrays)."""

    def __init__(self, client, source: ChunkedRows, block_rows: int | None = None):
        from distributed import wait
        self.client, self.source = client, source  # the scratch file lives as long as this table
        self.n, self.p = source.n, source.p
        self.block_rows = int(block_rows or max(1, min(source.budget, CLUSTER_BLOCK_BYTES) // (8 * self.p)))
        self.starts = np.arange(0, self.n, self.block_rows)
        self.bounds = [(int(a), int(min(a + self.block_rows, self.n))) for a in self.starts]
        self.parts = [client.submit(_read_block, str(source.path), a, b, self.p, pure=False) for a, b in self.bounds]
        wait(self.parts)
        self.passes = 0  # distributed reductions computed

    def __repr__(self) -> str:
        return f"ClusterRows({self.n} x {self.p}, {len(self.parts)} blocks on {self.client.scheduler.address})"

    def _each(self, fn, *per_block) -> list:
        """fn(block, *args) on every block where it lives; the results, in row order."""
        self.passes += 1
        return self.client.gather(self.client.map(fn, self.parts, *per_block, pure=False))

    def _on(self, picked: list[int], fn, *per_block) -> list:
        """fn(block, *args) on the blocks `picked`; arrays among the args travel as scattered data, not
        inside the task graph (a sample's indices and weights at 1e7 rows are tens of MB)."""
        self.passes += 1
        sent = [self.client.scatter(list(a), hash=False) if a and isinstance(a[0], np.ndarray) else a
                for a in per_block]
        return self.client.gather(self.client.map(fn, [self.parts[k] for k in picked], *sent, pure=False))

    def _spread(self, u: np.ndarray) -> list:
        """u's rows sent to the workers, one piece for each block (unhashed: a fresh vector each pass)."""
        return self.client.scatter([np.ascontiguousarray(u[a:b]) for a, b in self.bounds], hash=False)

    def _same(self, v) -> list:
        return [v] * len(self.parts)

    def _grouped(self, rows: np.ndarray) -> tuple[list[int], list[np.ndarray], list[np.ndarray]]:
        """For increasing rows: (the blocks holding some, the rows' places in those blocks, their places in rows)."""
        owner = np.searchsorted(self.starts, rows, side="right") - 1
        picked, local, where = [], [], []
        for k in np.unique(owner):
            at = np.flatnonzero(owner == k)
            picked.append(int(k))
            local.append(rows[at] - self.starts[k])
            where.append(at)
        return picked, local, where

    def blocks(self) -> Iterator[tuple[int, int, np.ndarray]]:
        for (a, b), part in zip(self.bounds, self.parts):
            yield a, b, part.result()

    def read(self, first: int, last: int) -> np.ndarray:
        first, last = max(0, first), min(self.n, last)
        return self.take(np.arange(first, last)) if last > first else np.empty((0, self.p))

    def take(self, rows, out: np.ndarray | None = None) -> np.ndarray:
        rows = self._checked_rows(rows)
        out = np.empty((rows.size, self.p)) if out is None else out
        if rows.size:
            unique, back = np.unique(rows, return_inverse=True)
            picked, local, where = self._grouped(unique)
            found = np.empty((unique.size, self.p))
            for at, got in zip(where, self._on(picked, _rows, local)):
                found[at] = got
            out[...] = found[back]
        return out

    def columns(self, cols) -> np.ndarray:
        return np.concatenate(self._each(_columns, self._same(cols)), axis=0)

    def __matmul__(self, v):
        v = np.asarray(v, dtype=np.float64)
        if v.shape[0] != self.p:
            raise ValueError(f"matmul: {self.n} x {self.p} table times a vector of {v.shape[0]}")
        return np.concatenate(self._each(_times, self._same(v)), axis=0)

    def transposed_product(self, u: np.ndarray) -> np.ndarray:
        return np.sum(self._each(_transposed_times, self._spread(u)), axis=0)

    def gram(self) -> np.ndarray:
        return np.sum(self._each(_gram), axis=0)

    def weighted_square_sums(self, weights: np.ndarray) -> np.ndarray:
        return np.sum(self._each(_weighted_squares, self._spread(np.asarray(weights, dtype=np.float64))), axis=0)

    def squared_norm(self) -> float:
        return float(np.sum(self._each(_squares)))

    def centred_rows(self, center, weights=None):
        pieces = self._each(_centred, self._same(center),
                            self._same(None) if weights is None else self._spread(weights))
        sq = np.concatenate([s for s, _ in pieces])
        return sq, None if weights is None else np.sum([a for _, a in pieces], axis=0)

    def sampled_gram(self, rows, root, center):
        rows = np.arange(self.n) if rows is None else np.asarray(rows, dtype=np.intp)
        picked, local, where = self._grouped(rows)
        pieces = self._on(picked, _sampled, local, [root[at] for at in where], self._same(center)[:len(picked)])
        sq = np.empty(rows.size)
        for at, (_M, _h, s) in zip(where, pieces):
            sq[at] = s
        return np.sum([M for M, _h, _s in pieces], axis=0), np.sum([h for _M, h, _s in pieces], axis=0), sq


class DaskMissing(RuntimeError):
    """dask.distributed is not installed (an optional extra)."""


def connect(address: str, workers: int | None = None):
    """A dask.distributed Client: to the scheduler at `address` (e.g. tcp://10.0.0.5:8786), or for
    `local` to a LocalCluster started here (`workers` processes of one thread, loopback only, no
    dashboard), closed with the client."""
    try:
        from distributed import Client, LocalCluster
    except ImportError:
        raise DaskMissing('--engine cluster needs Dask, which is not installed: pip install "dask[array]" '
                          "distributed (or objc's extra: pip install -e '.[cluster]')") from None
    if address == LOCAL:
        cluster = LocalCluster(n_workers=workers or 2, threads_per_worker=1, processes=True, host="127.0.0.1",
                               dashboard_address=None)
        client = Client(cluster)
        client._objc_cluster = cluster  # closed with the client by `close`
        return client
    return Client(address)


@contextlib.contextmanager
def connected(address: str, workers: int | None = None):
    """`connect`, closed (and a cluster it started, stopped) when the block ends."""
    client = connect(address, workers)
    try:
        yield client
    finally:
        close(client)


def close(client) -> None:
    cluster = getattr(client, "_objc_cluster", None)
    client.close()
    if cluster is not None:
        cluster.close()


def on_cluster(data, client, block_rows: int | None = None):
    """`data` (a BoundData from `bind_in_chunks`) with its rows held by the cluster's workers."""
    from dataclasses import replace
    if not isinstance(data.X, ChunkedRows):
        raise TypeError("on_cluster takes the BoundData of chunked_tables.bind_in_chunks")
    return replace(data, X=ClusterRows(client, data.X, block_rows))
