"""Command palette entries: every described binding of the screen in front, by name."""

from __future__ import annotations

from functools import partial
from typing import TYPE_CHECKING

from textual.command import DiscoveryHit, Hit, Hits, Provider

if TYPE_CHECKING:
    from textual.binding import ActiveBinding


class TriageCommands(Provider):
    """Offer the keyboard actions of the screen under the palette as searchable commands.

    Titles start with a group word (`pane:`, `model:`, `fit:`, `rows:`, `app:`) so related
    commands sort together.
    """

    def _commands(self) -> list[tuple[str, str, ActiveBinding]]:
        screen = self.screen
        found: dict[str, tuple[str, str, ActiveBinding]] = {}
        for active in screen.active_bindings.values():
            binding = active.binding
            if not binding.description or binding.id is None or not active.enabled:
                continue
            title = f"{_group(binding.id)}: {binding.description}"
            found.setdefault(binding.id, (title, binding.tooltip, active))
        return list(found.values())

    async def _run(self, active: ActiveBinding) -> None:
        await self.app.run_action(active.binding.action, active.node)

    async def discover(self) -> Hits:
        """List every command when nothing is typed yet."""
        for title, help_text, active in self._commands():
            yield DiscoveryHit(title, partial(self._run, active), help=help_text)

    async def search(self, query: str) -> Hits:
        """Match typed text against the command titles, or as words of their descriptions.

        So `curvature`, `spline`, `Huber` or `robust` find the checks by what they do.
        """
        matcher = self.matcher(query)
        words = query.strip().lower()
        for title, help_text, active in self._commands():
            score = matcher.match(title)
            if score <= 0 and words and words in f"{title} {help_text}".lower():
                score = 0.5  # a whole word of the description: below a match of the title
            if score > 0:
                yield Hit(
                    score, matcher.highlight(title), partial(self._run, active), help=help_text
                )


def _group(binding_id: str) -> str:
    """Return the group word of a binding id for the palette title."""
    if binding_id.startswith(("pane-", "next-pane", "previous-pane")):
        return "pane"
    if binding_id in {
        "set-target",
        "toggle-term",
        "cycle-transform",
        "toggle-categorical",
        "set-weights",
        "edit-filter",
        "edit-terms",
    }:
        return "model"
    if binding_id in {
        "quick-fit",
        "start-full-pass",
        "cancel-pass",
        "toggle-robust",
        "toggle-quantile-chart",
        "run-checks",
        "show-checks",
        "next-predictor",
        "next-segment-column",
    }:
        return "fit"
    if binding_id in {"quit", "show-help", "open-palette"}:
        return "app"
    return "rows"
