"""plantrig: a virtual plant on the controller test bench."""

__version__ = "0.1.0"

CAUTION = (
    "CAUTION: plantrig is a test tool, not a safety function. A controller under test may "
    "also be wired to real power stages. Follow your site's safety rules and local codes, "
    "keep hardware interlocks and E-stops independent of this simulator, and have licensed "
    "practice sign off anything that can move or heat."
)
