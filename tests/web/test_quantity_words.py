"""Every model quantity the page can show has a title and a plain-language subtitle."""

from server.protocol.model import ESTIMATE_PARAMETERS
from server.web.words import QUANTITIES


def test_every_estimated_parameter_has_words():
    missing = [name for name in ESTIMATE_PARAMETERS if name not in QUANTITIES]
    assert missing == []
