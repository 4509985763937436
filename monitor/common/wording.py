"""Wording shared by the command line, the e-mails, the reports and the dashboard."""

#: The caution every output that shows estimates carries.
CAUTION = ("Caution: statistical estimates with model risk, not investment advice; follow your "
           "firm's model-risk policy and local regulation.")
