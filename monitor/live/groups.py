"""Groups in the live service: attributes, pooled latest estimates and group alerts kept
current after every committed batch.

:class:`GroupUpkeep` is built by :class:`monitor.live.monitor.Monitor` from the ``[series]``
section. At start it stores the attributes file (if any) and installs the outbox hold for
member alerts (:func:`monitor.store.groups.member_hold`); after each committed batch
:meth:`GroupUpkeep.after_batch` stores the key parts of new series as attributes, recomputes
the pooled latest estimates and folds member alerts into ``group_change`` alerts. These are
derived data, written in their own transaction right after the batch's: after a crash between
the two, the next batch recomputes them, and a member notification is held in the outbox for
``group_hold_s`` so no member is sent on its own for want of a fold that had not run yet.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Iterable

from monitor.groups.attributes import group_resolver, read_attributes
from monitor.groups.keys import key_attributes
from monitor.groups.settings import GroupSettings, group_settings
from monitor.store import groups as sgroups


def settings_from_config(config) -> GroupSettings:
    """:class:`GroupSettings` from a config's ``[series]`` section (paths from its folder)."""
    base = Path(config.path).parent if getattr(config, "path", None) and \
        Path(str(config.path)).exists() else None
    return group_settings(config.section("series"), base_dir=base)


class GroupUpkeep:
    """Keeps a store's group data current; a no-op when neither composite keys nor groups are
    configured."""

    def __init__(self, store, settings: GroupSettings):
        self.store = store
        self.settings = settings
        self.enabled = settings.active or len(settings.key) > 1 or bool(settings.attributes)
        self._known: set[str] = set()
        file_attrs = read_attributes(settings.attributes) if settings.attributes else None
        self.resolve = (group_resolver(list(settings.groups), list(settings.key), file_attrs)
                        if settings.active else None)
        if not self.enabled:
            return
        if file_attrs is not None:
            sgroups.write_attributes(store, file_attrs, source="file")
        if self.resolve is not None:
            store.notify_hold = sgroups.member_hold(self.resolve, settings.alerts)

    def after_batch(self, series: Iterable[str], now: Any = None) -> dict:
        """Store new series' key parts, pool the latest estimates, fold group alerts."""
        if not self.enabled:
            return {}
        new = [s for s in dict.fromkeys(series) if s not in self._known]
        if new and len(self.settings.key) > 1:
            sgroups.write_attributes(self.store, key_attributes(new, list(self.settings.key)),
                                     source="key", now=now)
        self._known.update(new)
        if not self.settings.active:
            return {}
        sgroups.update_pooled(self.store, list(self.settings.groups), fdr=self.settings.fdr)
        return sgroups.fold_group_alerts(self.store, list(self.settings.groups), self.resolve,
                                         self.settings.alerts, now=now)
