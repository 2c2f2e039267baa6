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
    # the hybrid model-based/model-free learner of two-stage tasks (Daw et al. 2011)
    "w": ("model-based weight w", "balance of control; 1 = goal-directed (uses the transitions), 0 = habitual"),
    "alpha1": ("first-stage learning rate α1", "how far one trial moves the habitual value of the first choice"),
    "alpha2": ("second-stage learning rate α2", "how far one outcome moves the value of the port it came from"),
    "lambda": ("eligibility λ", "how much the outcome itself reaches back to the first choice's habitual value"),
    "beta1": ("first-stage inverse temperature β1", "first-choice consistency; higher = exploits more"),
    "beta2": ("second-stage inverse temperature β2", "second-choice consistency; higher = exploits more"),
    "persev": ("perseveration", "tendency to repeat the previous first choice; negative = tends to alternate"),
    "exploration": (
        "exploration",
        "predicted probability of not choosing the best option next; higher = explores more",
    ),
}


def quantity(name: str) -> tuple[str, str]:
    """The title and plain-language subtitle of a model quantity."""
    return QUANTITIES.get(name, (name, "model quantity"))
