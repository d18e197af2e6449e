"""plantrig: a virtual plant on the controller test bench."""

__version__ = "0.1.0"

CAUTION = (
    "CAUTION: plantrig is a test tool, not a safety function. A controller under test may "
    "also be wired to real power stages. Follow your site's safety rules and local codes, "
    "keep hardware interlocks and E-stops independent of this simulator, and have licensed "
    "practice sign off anything that can move or heat."
)

REALTIME_BANNER = CAUTION + (
    " This run is paced to the wall clock and talks to real equipment. Where the machine "
    "or process falls under functional-safety standards (IEC 61508 and its sector "
    "standards, ISO 13849 or IEC 62061 for machinery control systems), its safety "
    "functions must be specified, verified and validated to those standards by competent, "
    "where required licensed, people; a rehearsal in plantrig is not such evidence and its "
    "interlocks are not safety functions."
)
