"""Library messages in the words of the command line: options, not Python keywords.

The library's errors speak to Python callers (``pre=``, ``date_format='dmy'``,
``save_outcomes()``). On the command line the same mistake is fixed with an
option, so before a message is printed each keyword of the command that ran is
replaced by its option, and a few library names by the command that does the job.
"""

from __future__ import annotations

import re

# Library keywords whose option has another name, for every command that has the option.
LIBRARY_KEYWORDS = {
    "tolerance_m": "--tolerance",
    "max_dropped_share": "--allow-dropped",
    "dropped_path": "--dropped",
    "keep_types": "--types",
    "rate_ratios": "--rate-ratio",
    "n_sims": "--simulated-trials",
    "by_type": "--type-column",
    "baseline": "--baseline-column",
    "balance_columns": "--balance",
}
# n_draws is the design's draws in some commands and the tests' draws in others.
DRAWS_OPTIONS = ("--design-draws", "--test-draws")
# Library functions named in messages, and the command that does their job.
FUNCTIONS = {
    "save_outcomes()": "'geoexp count' (or 'geoexp load-counts' for a ready table)",
    "count_incidents()": "'geoexp count'",
    "write_trial()": "'geoexp draw'",
    "check_design()": "'geoexp check'",
}


def command_keywords(params) -> dict[str, str]:
    """Python keyword -> option, for a click command's parameters (options only)."""
    found: dict[str, str] = {}
    for param in params:
        opts = [o for o in getattr(param, "opts", ()) if o.startswith("--")]
        if param.param_type_name != "option" or not opts or getattr(param, "hidden", False):
            continue
        found[param.name] = opts[0]
    options = set(found.values())
    for keyword, option in LIBRARY_KEYWORDS.items():
        if option in options or (keyword == "by_type" and "--type-column" in options):
            found.setdefault(keyword, option)
    for option in DRAWS_OPTIONS:
        if option in options:
            found.setdefault("n_draws", option)
    return found


def _value(text: str) -> str:
    # 'dmy' -> dmy; True -> nothing (a flag)
    if text in ("True", "False"):
        return ""
    return " " + text.strip("'\"")


def in_option_words(message: str, keywords: dict[str, str]) -> str:
    """Replace Python keywords and library functions in ``message`` by options and commands."""
    for function, words in FUNCTIONS.items():
        message = message.replace(function, words)
    for keyword in sorted(keywords, key=len, reverse=True):
        option = keywords[keyword]

        def with_value(m: re.Match[str], o: str = option) -> str:
            return o + _value(m.group(1))

        # keyword=value (a quoted text, a number, True/False), then a bare keyword=
        message = re.sub(
            rf"(?<![\w-]){re.escape(keyword)}=('[^']*'|\"[^\"]*\"|True|False|-?[\d.]+)",
            with_value,
            message,
        )
        message = re.sub(rf"(?<![\w-]){re.escape(keyword)}=", option, message)
        if "_" in keyword:  # a name no English word shares, even without '='
            message = re.sub(rf"(?<![\w-]){re.escape(keyword)}\b", option, message)
    return message
