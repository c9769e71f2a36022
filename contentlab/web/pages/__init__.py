"""The five pages of the web app, one module each (Drafts, Experiments, History, Report, Import)."""
