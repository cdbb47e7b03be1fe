"""The Streamlit dashboard: ``app.py`` routes to the pages in ``views/``; figures are pure functions in
``figures.py``; pages read widgets, call one service, render (no SQL, no rules)."""
