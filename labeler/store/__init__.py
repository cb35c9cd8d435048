"""The lookup store: per-user footprints in SQLite shards, served from immutable snapshots.

Layout of a store folder::

    CURRENT                          name of the snapshot readers use (switched atomically)
    snapshots/<name>/manifest.json   watermark, taxonomy version, label config, shard checksums
    snapshots/<name>/items.sqlite    item topics (with validity) and topic names
    snapshots/<name>/users-NN.sqlite footprints and history of the users hashed to shard NN
    tombstones.json                  SHA-256 of erased user ids, never published again

A publish writes a new snapshot folder (shards whose content did not change are hard links to the
previous snapshot's files), fsyncs it, then renames a new ``CURRENT`` into place: a reader sees one
complete snapshot or the previous one, never a mix. Old snapshots beyond ``retain`` are removed.
"""
from .erase import Erasure, forget_users
from .layout import shard_of
from .publish import publish_store
from .reader import Classification, Footprint, Store, TopicState, open_store

__all__ = ["Classification", "Erasure", "Footprint", "Store", "TopicState", "forget_users", "open_store", "publish_store",
           "shard_of"]
