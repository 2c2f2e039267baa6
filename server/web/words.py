"""Each model quantity with a plain-language subtitle, and rule firings as sentences
(`firing_words`, shared with the lab's tiles: server/lab/rule_words.py)."""

from __future__ import annotations

from server.lab.rule_words import firing_words

__all__ = ["QUANTITIES", "firing_words", "quantity"]

# name -> (title, what it means for the animal); a name not listed here is shown as it is
QUANTITIES: dict[str, tuple[str, str]] = {
    "alpha": ("learning rate α", "how far one outcome moves the learned value; higher = forgets older outcomes faster"),
    "alpha_pos": ("learning rate α+", "update after a better-than-expected outcome; higher = learns faster from wins"),
    "alpha_neg": ("learning rate α−", "update after a worse-than-expected outcome; higher = learns faster from losses"),
    "beta": ("inverse temperature β", "choice consistency; higher = exploits more, lower = explores more"),
    "kappa": ("perseveration κ", "bonus for repeating the previous choice; negative = tends to alternate"),
    "decay": ("forgetting rate", "how fast unchosen values drift back; higher = forgets faster"),
    "exploration": (
        "exploration",
        "predicted probability of not choosing the best option next; higher = explores more",
    ),
}


def quantity(name: str) -> tuple[str, str]:
    """The title and plain-language subtitle of a model quantity."""
    return QUANTITIES.get(name, (name, "model quantity"))
