"""Randomness as a pure function of (seed, epoch, purpose).

Exact branching (a run forked from a trunk checkpoint equals the same run trained from
scratch) needs every random draw of epoch ``e`` to be independent of what happened before
``e``. So no code draws from one long global stream: each epoch asks for a fresh generator
keyed by its seed, its epoch number and what the numbers are for.
"""

from __future__ import annotations

import hashlib

import torch

#: Epoch value used for draws that happen once per run rather than once per epoch.
ONCE = -1


def derive_seed(seed: int, epoch: int, purpose: str) -> int:
    """A 63-bit integer seed that depends only on the three keys (stable across processes)."""
    digest = hashlib.blake2b(f"{seed}|{epoch}|{purpose}".encode(), digest_size=8).digest()
    return int.from_bytes(digest, "little") & ((1 << 63) - 1)


def generator(seed: int, epoch: int, purpose: str) -> torch.Generator:
    """A CPU ``torch.Generator`` seeded from (seed, epoch, purpose)."""
    gen = torch.Generator()
    gen.manual_seed(derive_seed(seed, epoch, purpose))
    return gen
