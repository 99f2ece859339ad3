"""Phone inventories: the phones, their roles (silence, noise) and named classes.

- `PhoneInventory`: the record.
- `read_phones(path, diagnostics=None)`: validating reader.
"""

from __future__ import annotations

import dataclasses


@dataclasses.dataclass
class PhoneInventory:
    phones: list[str]  # every phone, file order (silence and noise included)
    silence: list[str] = dataclasses.field(default_factory=list)
    noise: list[str] = dataclasses.field(default_factory=list)
    classes: dict[str, list[str]] = dataclasses.field(default_factory=dict)
    path: str = "<memory>"

    @property
    def optional_silence(self) -> str | None:
        """The phone inserted as optional silence: the first silence phone, if any."""
        return self.silence[0] if self.silence else None
