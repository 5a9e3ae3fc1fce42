"""Every Redis key, stream and channel name, in one place.

All keys of one model share the hash tag ``{<model name>}``, so they live in one
Cluster slot and a multi-key script on them is atomic. The model index is global
and is updated after the model's own atomic write (idempotently).

======================================  ============  ==================================
key                                     type          holds
======================================  ============  ==================================
``<prefix>:models``                     set           names of all models
``<prefix>:{<name>}:model``             hash          dimension, created_at, updated_at,
                                                      latest (last number allocated),
                                                      serving, stamp (bumped on every
                                                      serving change or deletion)
``<prefix>:{<name>}:versions``          sorted set    version numbers (score = number)
``<prefix>:{<name>}:version:<n>``       hash          one immutable parameter set
``<prefix>:{<name>}:job-versions``     hash          writer -> the version it wrote (a
                                                      writer writes at most one): a fit
                                                      job's id, or ``import:<digest>`` of
                                                      an import's request key (and
                                                      ``import:<digest>:request`` -> the
                                                      fingerprint of its body)
``<prefix>:{<name>}:drift:<n>``        string        the last MIXSCORE_DRIFT_WINDOW tail
                                                      fractions of version n's scored
                                                      complete rows, float64, oldest first,
                                                      from all API processes (expires a
                                                      week after the last)
``<prefix>:drift-windows``              set           "<name> <n>" of every drift window
``<prefix>:rate:<key id>:<second>``    string        requests of one API key in one second
                                                      (MIXSCORE_RATE_LIMIT); expires in 3 s
``<prefix>:events``                     channel       "<name>" after a serving change or
                                                      deletion
``<prefix>:{jobs}:stream``              stream        one entry per run of a job, read by
                                                      the consumer group ``workers``
``<prefix>:{jobs}:job:<id>``            hash          a fit job: spec, state, attempts,
                                                      progress, result (expires
                                                      MIXSCORE_JOB_RETENTION_S after it ends)
``<prefix>:{job-<id>}:data``            hash          its inline rows: points, weights
                                                      (deleted when the job ends)
``<prefix>:{jobs}:recent``              sorted set    job ids by submission time
``<prefix>:{jobs}:active:<name>``       set           ids of the model's queued and running
                                                      jobs (MIXSCORE_MAX_JOBS_PER_MODEL)
``<prefix>:{jobs}:idempotency:<sha>``   string        "<job id> <body fingerprint>" of a
                                                      request key (expires after 24 h)
``<prefix>:{dataset-<id>}:dataset``     hash          an uploaded dataset: dimension, rows,
                                                      bytes, chunks, request (its body's
                                                      fingerprint; expires when unused)
``<prefix>:{dataset-<id>}:chunks``      list          its chunks, raw little-endian float64
``<prefix>:{dataset-<id>}:requests``    hash          request key of a chunk -> its number
                                                      (a repeated append adds nothing),
                                                      ``<request key>:request`` -> the
                                                      fingerprint of its body

Job records share the hash tag ``{jobs}``, so submitting a job (hash, index and stream
entry) is one script on a Cluster too. Bulk data has tags of its own, so that it spreads
over a Cluster's nodes: a job's inline rows ``{job-<id>}``, a dataset ``{dataset-<id>}``.
Datasets of earlier releases live under ``<prefix>:{jobs}:dataset:<id>`` (with
``:chunks`` and ``:requests``) and are read there until they expire.
======================================  ============  ==================================
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass


@dataclass(frozen=True)
class DatasetKeys:
    info: str
    chunks: str
    requests: str

    @property
    def all(self) -> tuple[str, str, str]:
        return self.info, self.chunks, self.requests


@dataclass(frozen=True)
class Keys:
    prefix: str

    @property
    def models(self) -> str:
        return f"{self.prefix}:models"

    @property
    def events(self) -> str:
        return f"{self.prefix}:events"

    def model(self, name: str) -> str:
        return f"{self.prefix}:{{{name}}}:model"

    def versions(self, name: str) -> str:
        return f"{self.prefix}:{{{name}}}:versions"

    def version(self, name: str, number: int) -> str:
        return f"{self.prefix}:{{{name}}}:version:{number}"

    def writers(self, name: str) -> str:
        # Named for its first writers, fit jobs; imports joined them (see the table).
        return f"{self.prefix}:{{{name}}}:job-versions"

    @property
    def jobs(self) -> str:
        return f"{self.prefix}:{{jobs}}:stream"

    #: The consumer group of fit workers on the jobs stream.
    workers_group = "workers"

    def job(self, job_id: str) -> str:
        return f"{self.prefix}:{{jobs}}:job:{job_id}"

    def job_data(self, job_id: str) -> str:
        return f"{self.prefix}:{{job-{job_id}}}:data"

    @property
    def recent_jobs(self) -> str:
        return f"{self.prefix}:{{jobs}}:recent"

    def active_jobs(self, name: str) -> str:
        return f"{self.prefix}:{{jobs}}:active:{name}"

    def drift_window(self, name: str, version: int) -> str:
        return f"{self.prefix}:{{{name}}}:drift:{version}"

    @property
    def drift_windows(self) -> str:
        return f"{self.prefix}:drift-windows"

    def rate_window(self, key_id: str, second: int) -> str:
        return f"{self.prefix}:rate:{key_id}:{second}"

    def dataset(self, dataset_id: str, legacy: bool = False) -> DatasetKeys:
        """A dataset's keys; ``legacy``: where earlier releases kept it, under ``{jobs}``."""
        base = (f"{self.prefix}:{{jobs}}:dataset:{dataset_id}" if legacy
                else f"{self.prefix}:{{dataset-{dataset_id}}}:dataset")
        tag = base.rpartition(":")[0] if not legacy else base
        return DatasetKeys(info=base, chunks=f"{tag}:chunks", requests=f"{tag}:requests")

    def idempotency(self, key: str) -> str:
        digest = hashlib.sha256(key.encode()).hexdigest()
        return f"{self.prefix}:{{jobs}}:idempotency:{digest}"
