"""Component ids of the dashboard, in one place (docs/contracts.md: layouts use ids from here only).

Plain strings for single components; the ``*_TYPE`` names are the ``type`` of dict ids for
repeated items (the window study's figures and tables).
"""

# shell
URL = "shell-url"
NAV = "shell-nav"
PAGE = "shell-page"
PROVENANCE = "shell-provenance"

# board (universe overview)
BOARD_DATE = "board-date"
BOARD_TAIL_SOURCE = "board-tail-source"
BOARD_MESSAGE = "board-message"
BOARD_MATRIX_TAU = "board-matrix-tau"
BOARD_MATRIX_LOWER = "board-matrix-lower"
BOARD_MATRIX_UPPER = "board-matrix-upper"
BOARD_RANKING = "board-ranking"
BOARD_SUMMARY = "board-summary"
#: The stored range of dates, set when the page renders: loads the universe summary once.
BOARD_UNIVERSE = "board-universe-range"
BOARD_NOTE = "board-note"
BOARD_HORIZON = "board-horizon"
BOARD_EXCESS_LOWER = "board-excess-lower"
BOARD_EXCESS_UPPER = "board-excess-upper"
BOARD_CHANGE_TAU = "board-change-tau"
BOARD_CHANGE_LOWER = "board-change-lower"
BOARD_CHANGE_UPPER = "board-change-upper"
BOARD_CHANGE_NOTE = "board-change-note"

# timeline (pair history)
TIMELINE_PAIR = "timeline-pair"
TIMELINE_MESSAGE = "timeline-message"
TIMELINE_FIGURE = "timeline-figure"
TIMELINE_EPISODES = "timeline-episodes"
TIMELINE_RANGE = "timeline-range"
TIMELINE_OPEN_STUDY = "timeline-open-study"
TIMELINE_NOTE = "timeline-note"

# drill-down (window study)
STUDY_PAIR = "study-pair"
STUDY_RANGE = "study-range"
STUDY_REFERENCE = "study-reference"
STUDY_REPLICATES = "study-replicates"
STUDY_RUN = "study-run"
STUDY_CANCEL = "study-cancel"
STUDY_PROGRESS = "study-progress"
STUDY_RESULT = "study-result"
STUDY_REPORT = "study-report"
STUDY_REPORT_DOWNLOAD = "study-report-download"
STUDY_STORE = "study-store"
STUDY_REFERENCE_MODE = "study-reference-mode"
STUDY_MESSAGE = "study-message"
STUDY_PROGRESS_BOX = "study-progress-box"
STUDY_PROGRESS_LABEL = "study-progress-label"
STUDY_AUTORUN = "study-autorun"
# repeated items of the results: {"type": STUDY_FIGURE_TYPE, "role": "study"|"reference",
# "name": ...} figures and {"type": STUDY_TABLE_TYPE, ...} tables
STUDY_FIGURE_TYPE = "study-figure"
STUDY_TABLE_TYPE = "study-table"

# episodes (alerts)
EPISODES_ACTIVE = "episodes-active"
EPISODES_HISTORY = "episodes-history"
EPISODES_RULES = "episodes-rules"
EPISODES_OUTBOX = "episodes-outbox"
EPISODES_CHART = "episodes-chart"
EPISODES_PAIR = "episodes-pair"
EPISODES_TAILS = "episodes-tails"
EPISODES_CAUSES = "episodes-causes"
EPISODES_COUNT = "episodes-count"

# inputs (data)
INPUTS_COVERAGE = "inputs-coverage"
INPUTS_INGESTS = "inputs-ingests"
INPUTS_ASSET = "inputs-asset"
INPUTS_MARGINAL = "inputs-marginal"
INPUTS_COVERAGE_FIGURE = "inputs-coverage-figure"
INPUTS_REVISIONS = "inputs-revisions"
INPUTS_LAGS = "inputs-lags"
INPUTS_RESIDUALS = "inputs-residuals"
INPUTS_ACF = "inputs-acf"
INPUTS_QQ = "inputs-qq"
INPUTS_LJUNG_BOX = "inputs-ljung-box"
INPUTS_NOTE = "inputs-note"
