"""Start Streamlit with the dashboard's heavy modules already imported, so that the first page a clinician
opens does not also pay for importing pandas, Plotly, SQLAlchemy and the criteria engine.

Used by :mod:`tracker.serving` as ``python -m tracker.dashboard.launch run APP [flags]``.
"""

from __future__ import annotations

import sys


def main() -> None:
    import importlib

    import plotly.graph_objects  # noqa: F401
    import plotly.subplots  # noqa: F401
    from streamlit.web.cli import main as streamlit_main

    import tracker.dashboard.figures  # noqa: F401
    import tracker.services.cohort  # noqa: F401
    import tracker.services.evaluation  # noqa: F401
    import tracker.services.follow_up  # noqa: F401
    from tracker.criteria import engine

    for module in engine.REGISTRY.values():  # the criteria sets are imported on first use otherwise
        importlib.import_module(f"tracker.criteria.sets.{module}")

    no_outside_lookups()
    sys.argv = ["streamlit", *sys.argv[1:]]
    streamlit_main()


def no_outside_lookups() -> None:
    """Streamlit looks up the machine's public address (an HTTP request to an outside service) when it is
    bound to every address; a clinic's dashboard never reaches outside the hospital network, so both address
    lookups answer "unknown" without any network traffic."""
    from streamlit import net_util

    net_util.get_external_ip = lambda: None
    net_util.get_internal_ip = lambda: None


if __name__ == "__main__":
    main()
