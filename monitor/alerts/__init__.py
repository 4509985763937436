"""Alerts: the rules, the mailer and the charts of an alert e-mail."""
