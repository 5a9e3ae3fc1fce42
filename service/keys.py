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
``<prefix>:events``                     channel       "<name>" after a serving change or
                                                      deletion
======================================  ============  ==================================
"""

from __future__ import annotations

from dataclasses import dataclass


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
