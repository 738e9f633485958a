"""lensview in the browser: ``streamlit run app.py`` opens on the demo field."""

from lensview.page import main

main()
