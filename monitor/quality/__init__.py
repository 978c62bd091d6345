"""Quality control: the QARTOD tests as pure functions, their settings and tables, and the technicians' diagnostics."""
