"""Every Dash component id, in one place (each page appends its own section).

Ids are plain strings; pattern-matching ids are built by small functions here.
"""

# -- shell (webapp/web/ui/shell.py) ----------------------------------------------
SHELL_NAV = "shell-nav"
SHELL_USER = "shell-user"

# -- home page (webapp/web/pages/home.py) -------------------------------------------
HOME_UPLOAD = "home-upload"
HOME_UPLOAD_MESSAGE = "home-upload-message"
HOME_DATASET_LIST = "home-dataset-list"

# -- upload page (webapp/web/pages/upload.py) ---------------------------------------
UPLOAD_DROP = "upload-drop"
UPLOAD_FILE = "upload-file"  # dcc.Store: {"filename", "size"} of the file being checked
UPLOAD_ID_COLUMN = "upload-id-column"
UPLOAD_SHEET = "upload-sheet"
UPLOAD_BELOW_LIMIT = "upload-below-limit"
UPLOAD_BAD_CELLS = "upload-bad-cells"
UPLOAD_ROLES = "upload-roles"  # dash-ag-grid: column, role (editable), unit, missing, below limit
UPLOAD_REPORT = "upload-report"
UPLOAD_RECHECK = "upload-recheck"
UPLOAD_CONFIRM = "upload-confirm"
UPLOAD_RESULT = "upload-result"
UPLOAD_LOCATION = "upload-location"

# -- dataset page (webapp/web/pages/dataset*.py) --------------------------------------
DATASET_ID = "dataset-id"  # dcc.Store: the dataset id of this page
DATASET_LOCATION = "dataset-location"  # dcc.Location (refresh=False): query string = view state
DATASET_NOTES = "dataset-notes"  # link values that were ignored
SETTINGS_DROP = "settings-drop"  # variables left out
SETTINGS_LOG10 = "settings-log10"
SETTINGS_SCALING = "settings-scaling"
SETTINGS_COMPONENTS = "settings-components"
SETTINGS_CONFIDENCE = "settings-confidence"
SETTINGS_METHOD = "settings-method"  # classical PCA or robust (ROBPCA)
SETTINGS_FIT = "settings-fit"
SETTINGS_EXCLUDED = "settings-excluded"  # samples left out of this fit (text + clear button)
SETTINGS_INCLUDE_ALL = "settings-include-all"
SETTINGS_APPLIED = "settings-applied"  # dcc.Store: model settings of the fit on screen
SETTINGS_RECOMMENDATION = "settings-recommendation"
FIT_PROGRESS = "fit-progress"
FIT_STATUS = "fit-status"
FIT_ERROR = "fit-error"
FIT_WARNINGS = "fit-warnings"  # the fit's warnings (dropped variables, imputation not converged, ...)
FIT_RESULT = "fit-result"  # dcc.Store: model id, fingerprint and summary numbers of the fit on screen
FIT_SOURCE = "fit-source"  # text: which model the plots show and whether it came from the cache
VIEW_TABS = "view-tabs"
VIEW_CONTENT = "view-content"
VIEW_PCX = "view-pcx"
VIEW_PCY = "view-pcy"
VIEW_COLOUR = "view-colour"
VIEW_SHAPE = "view-shape"
VIEW_LABELS = "view-labels"
VIEW_LOADINGS = "view-loadings"
VIEW_ORDER = "view-order"
VIEW_SAMPLE = "view-sample"  # dcc.Store: id of the sample whose explanation is open
VIEW_AXES_ROW = "view-axes-row"
VIEW_LOADINGS_ROW = "view-loadings-row"
VIEW_ORDER_ROW = "view-order-row"
GRAPH_VARIANCE = "graph-variance"
GRAPH_VARIABLE_EXPLAINED = "graph-variable-explained"
RANK_TABLE = "rank-table"
GRAPH_SCORES = "graph-scores"
GRAPH_LOADINGS = "graph-loadings"
GRAPH_T2_SPE = "graph-t2-spe"
GRAPH_T2_CHART = "graph-t2-chart"
GRAPH_SPE_CHART = "graph-spe-chart"
GRAPH_SPE_CONTRIB = "graph-spe-contributions"
GRAPH_T2_CONTRIB = "graph-t2-contributions"
EXPLAIN_PANEL = "explain-panel"
OUTLIER_GRID = "outlier-grid"
OUTLIER_NOTE = "outlier-note"
GRAPH_OUTLIER_MAP = "graph-outlier-map"  # score distance against orthogonal distance (Hubert et al. 2005)
METHOD_SIDE_BY_SIDE = "method-side-by-side"  # samples flagged by one method and not the other
METHOD_SELECT_ROBUST_ONLY = "method-select-robust-only"
METHOD_SELECT_CLASSICAL_ONLY = "method-select-classical-only"
# selection by box / lasso on the score and diagnostics plots; the review pages build on it
SELECTION_STORE = "selection-store"  # dcc.Store: {"dataset_id", "fingerprint", "sample_ids": [...]}
SELECTION_PANEL = "selection-panel"
SELECTION_CLEAR = "selection-clear"
SELECTION_LEAVE_OUT = "selection-leave-out"
DOWNLOAD_TABLE = "download-table"  # which table: scores / loadings / samples
DOWNLOAD_CSV = "download-csv"
DOWNLOAD_XLSX = "download-xlsx"
DOWNLOAD = "download"

# -- review pages (webapp/web/pages/review*.py, views*.py; owner REVIEW) ---------------
REVIEW_QUEUE = "review-queue"
REVIEW_CONTEXT = "review-context"  # dcc.Store: {"proposal_id", "dataset_id" (queue filter or None)}
REVIEW_COMMENT = "review-comment"
REVIEW_PASSWORD = "review-password"
REVIEW_APPROVE = "review-approve"
REVIEW_REJECT = "review-reject"
REVIEW_WITHDRAW = "review-withdraw"
REVIEW_MESSAGE = "review-message"
REVIEW_DETAIL = "review-detail"
PROPOSE_CONTEXT = "propose-context"  # dcc.Store: {"dataset_id", "samples", "action", "settings"}
PROPOSE_CATEGORY = "propose-category"
PROPOSE_REASON = "propose-reason"
PROPOSE_SUBMIT = "propose-submit"
PROPOSE_MESSAGE = "propose-message"
PROPOSE_CATEGORY_MESSAGE = "propose-category-message"  # a problem with the category, shown beside it
PROPOSE_REASON_MESSAGE = "propose-reason-message"
PROPOSE_PREVIEW = "propose-preview"
LOG_CONTEXT = "log-context"  # dcc.Store: {"dataset_id"}
LOG_ACTION_FILTER = "log-action-filter"
LOG_ACTOR_FILTER = "log-actor-filter"
LOG_TABLE = "log-table"
LOG_VERIFY = "log-verify"
VIEWS_LIST = "views-list"
VIEW_SAVE_CONTEXT = "view-save-context"  # dcc.Store: {"dataset_id", "query", "selection"}
VIEW_SAVE_TITLE = "view-save-title"
VIEW_SAVE_NOTE = "view-save-note"
VIEW_SAVE_BUTTON = "view-save-button"
VIEW_SAVE_MESSAGE = "view-save-message"
VIEW_OPEN = "view-open"
VIEW_SAVE_URL = "view-save-url"  # the saved view's full address, shown after saving
VIEW_SAVE_COPY = "view-save-copy"  # button copying VIEW_SAVE_URL to the clipboard
VIEW_BANNER = "view-banner"  # on the dataset page opened from a saved view: as saved or what differs
LOG_EXPORT = "log-export-csv"


def image_button(graph_id, image_format) -> dict:
    """Pattern id of a 'save picture' button (PNG or SVG) under a dataset-page plot."""
    return {"type": "image-button", "graph": graph_id, "format": image_format}
REVIEW_LINKS = "review-links"  # on the dataset page: propose / save view / log / views
REVIEW_PROPOSE_LINK = "review-propose-link"
VIEW_SAVE_LINK = "view-save-link"
RANK_STORE = "rank-store"  # dcc.Store: component-choice table computed on request for the fit on screen
RANK_BUTTON = "rank-button"
RANK_STATUS = "rank-status"
SCORE_DRAWN = "score-drawn"  # dcc.Store: what the score plot on screen shows (model, axes, colouring)

# -- accessibility (webapp/web/pages/dataset_tabs.py, webapp/web/pages/plot_numbers.py) --------
VIEW_TABLIST = "view-tablist"  # role=tablist: one button per tab of the dataset page
VIEW_TABPANEL = "view-tabpanel"  # role=tabpanel: the toolbar and contents of the open tab
EXPLAIN_SELECT = "explain-select"  # adds the explained sample to the selection (no pointer needed)


def view_tab(key: str) -> str:
    """Id of the tab button (role=tab) that opens the dataset page's tab ``key``."""
    return f"view-tab-{key}"


def plot_numbers_button(graph_id: str) -> str:
    """The "Show the numbers" button (aria-expanded) under a plot."""
    return f"{graph_id}-numbers-button"


def plot_numbers(graph_id: str) -> str:
    """The region holding the table of a plot's numbers."""
    return f"{graph_id}-numbers"


def plot_numbers_version(graph_id: str) -> str:
    """dcc.Store bumped when an open plot's figure changes, so its table is read again."""
    return f"{graph_id}-numbers-version"

# -- monitoring pages (webapp/web/pages/monitoring*.py; owner MONITORING) -------------------
MON_REFERENCE_LINK = "mon-reference-link"  # on the dataset page: make the fitted model a reference model
MON_PROPOSE_MODEL = "mon-propose-model"
MON_PROPOSE_NAME = "mon-propose-name"
MON_PROPOSE_NOTE = "mon-propose-note"
MON_PROPOSE_WARNING = "mon-propose-warning"
MON_PROPOSE_ACTION = "mon-propose-action"
MON_PROPOSE_RULES = "mon-propose-rules"
UPLOAD_PROJECT = "upload-project"
MON_PROPOSE_SUBMIT = "mon-propose-submit"
MON_PROPOSE_MESSAGE = "mon-propose-message"
MON_LIST = "mon-list"
MON_CONTEXT = "mon-context"  # dcc.Store: {"reference_model_id"} or {"batch_id"}
MON_FACTS = "mon-facts"
MON_SIGN_COMMENT = "mon-sign-comment"
MON_SIGN_PASSWORD = "mon-sign-password"
MON_APPROVE = "mon-approve"
MON_REJECT = "mon-reject"
MON_RETIRE = "mon-retire"
MON_SIGN_FORM = "mon-sign-form"  # approve / reject / retire, by state and role
MON_SIGN_MESSAGE = "mon-sign-message"
MON_UPLOAD = "mon-upload"  # dcc.Upload of a batch file
MON_UPLOAD_ID_COLUMN = "mon-upload-id-column"
MON_UPLOAD_RETEST = "mon-upload-retest"
MON_UPLOAD_MESSAGE = "mon-upload-message"
MON_CHART_STATISTIC = "mon-chart-statistic"  # t2, spe or PC<k>
MON_CHART = "mon-chart"
MON_VIOLATIONS = "mon-violations"
MON_BATCHES = "mon-batches"
MON_SAMPLES = "mon-samples"
MON_SAMPLE_CHOICE = "mon-sample-choice"
MON_CONTRIBUTIONS = "mon-contributions"
MON_OUTCOME_SAMPLES = "mon-outcome-samples"
MON_OUTCOME = "mon-outcome"
MON_OUTCOME_REASON = "mon-outcome-reason"
MON_OUTCOME_CAUSE = "mon-outcome-cause"
MON_OUTCOME_PASSWORD = "mon-outcome-password"
MON_OUTCOME_SUBMIT = "mon-outcome-submit"
MON_OUTCOME_MESSAGE = "mon-outcome-message"
MON_BATCH_STATE = "mon-batch-state"

# -- respondent screening tab (webapp/web/pages/dataset_screening.py) -----------------------
SCREENING_READY = "screening-ready"  # the tab's frame, there from the first render
SCREENING_STATUS = "screening-status"  # whether the variables look like items on one scale
SCREENING_DECLARED = "screening-declared"  # checklist: the user declares the items
SCREENING_FILTER = "screening-filter"  # all / flagged by one or more / by two or more indices
SCREENING_CUTOFFS = "screening-cutoffs"
SCREENING_PLOT = "graph-screening"
SCREENING_GRID = "screening-grid"
SCREENING_NOTE = "screening-note"
SCREENING_PROPOSE = "screening-propose"  # link to the proposal form, careless response

# -- accounts: the admin page (webapp/web/pages/admin.py) -----------------------------------
ADMIN_ADD_NAME = "admin-add-name"
ADMIN_ADD_PRINTED = "admin-add-printed"
ADMIN_ADD_ROLE = "admin-add-role"
ADMIN_ADD_PASSWORD = "admin-add-password"  # empty: a one-time password is made
ADMIN_ADD_SUBMIT = "admin-add-submit"
ADMIN_ADD_MESSAGE = "admin-add-message"
ADMIN_USERS = "admin-users"  # the table of accounts
ADMIN_TARGET = "admin-target"  # dropdown: the account to change
ADMIN_ROLE = "admin-role"  # dropdown: its new role
ADMIN_SET_ROLE = "admin-set-role"
ADMIN_DISABLE = "admin-disable"
ADMIN_ENABLE = "admin-enable"
ADMIN_UNLOCK = "admin-unlock"
ADMIN_RESET = "admin-reset"
ADMIN_CHANGE_MESSAGE = "admin-change-message"
ADMIN_LOG_VERIFY = "admin-log-verify"
ADMIN_LOG_TABLE = "admin-log-table"
ADMIN_LOG_PAGE = "admin-log-page"  # dcc.Store: the page of the admin log shown
ADMIN_LOG_NEWER = "admin-log-newer"
ADMIN_LOG_OLDER = "admin-log-older"
ADMIN_LOG_POSITION = "admin-log-position"

# -- accounts: my account (webapp/web/pages/account.py) -------------------------------------
ACCOUNT_OLD_PASSWORD = "account-old-password"
ACCOUNT_NEW_PASSWORD = "account-new-password"
ACCOUNT_REPEAT_PASSWORD = "account-repeat-password"
ACCOUNT_PASSWORD_SUBMIT = "account-password-submit"
ACCOUNT_PASSWORD_MESSAGE = "account-password-message"
ACCOUNT_SESSIONS = "account-sessions"
ACCOUNT_SESSION_CHOICE = "account-session-choice"
ACCOUNT_SESSION_END = "account-session-end"
ACCOUNT_SESSIONS_END_OTHERS = "account-sessions-end-others"
ACCOUNT_SESSION_MESSAGE = "account-session-message"
ACCOUNT_TOKEN_NAME = "account-token-name"
ACCOUNT_TOKEN_DAYS = "account-token-days"
ACCOUNT_TOKEN_READ_ONLY = "account-token-read-only"
ACCOUNT_TOKEN_SUBMIT = "account-token-submit"
ACCOUNT_TOKEN_MESSAGE = "account-token-message"
ACCOUNT_TOKENS = "account-tokens"
ACCOUNT_TOKEN_CHOICE = "account-token-choice"
ACCOUNT_TOKEN_REVOKE = "account-token-revoke"
ADMIN_ONE_TIME_PASSWORD = "admin-one-time-password"  # shown once, after adding a user or a reset
ACCOUNT_NEW_TOKEN = "account-new-token"  # shown once, after creating a token

# /admin/projects
PROJECTS_TABLE = "projects-table"
PROJECT_NEW_NAME = "project-new-name"
PROJECT_NEW_DESCRIPTION = "project-new-description"
PROJECT_NEW_SUBMIT = "project-new-submit"
PROJECT_NEW_MESSAGE = "project-new-message"
PROJECT_MEMBER_PROJECT = "project-member-project"
PROJECT_MEMBER_USER = "project-member-user"
PROJECT_MEMBER_ROLE = "project-member-role"
PROJECT_MEMBER_SUBMIT = "project-member-submit"
PROJECT_MEMBER_MESSAGE = "project-member-message"
