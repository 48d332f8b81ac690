"""The caution every command and every report shows: what this software is not.

One home for the words (the command line prints them on stderr, the HTML reports carry
them on every page). A lowest-layer module, importable from anywhere without cost.
"""

SAFETY_NOTICE = (
    'CAUTION: safety_filter is not a certified safety function. It does not replace '
    'hardware emergency stops, safety-rated monitoring or a risk assessment; local '
    'regulations and qualified safety engineers have the last word.')
