"""areamap: disease mapping for area-aggregated case counts.

Results are analytic aids, not public-health directives: decisions rest with
the responsible health authority and local rules.
"""

from .autocorrelation import (
    CLUSTER_LABELS,
    GlobalAutocorrelation,
    LocalClusterResult,
    adjust_pvalues,
    eb_standardized_rates,
    gearys_c,
    local_clusters,
    moran_scatter,
    morans_i,
    rate_local_clusters,
    rate_morans_i,
)
from .archive import FlagChanges, HistoryArchive
from .bulletin import (
    BulletinResult,
    FlagRules,
    PeriodAnalysis,
    analyse_period,
    file_sha256,
    flag_areas,
    render_bulletin,
    run_bulletin,
    suppress_counts,
)
from .bulletin.disclosure import DISCLOSING_COLUMNS, public_analysis, public_table
from .bulletin.wording import load_wording
from .config import RunConfig, load_config
from .demo import write_demo
from .errors import (
    AreamapError,
    AreamapWarning,
    ArchiveError,
    ConfigError,
    DataWarning,
    GeometryRepairedWarning,
    GraphError,
    InputError,
    ModelError,
    ModelWarning,
    ParameterError,
    SmallNumbersWarning,
)
from .geostatistics import (
    AreaPoints,
    PoissonKrigingResult,
    RiskSurface,
    RiskVariogram,
    SmootherValidation,
    VariogramModel,
    cross_validate_smoothers,
    discretize_areas,
    ordinary_kriging,
    poisson_kriging,
    risk_surface_map,
    risk_variogram,
    variogram_plot,
)
from .graphs import AreaGraph, GraphSummary, build_graph, read_extra_links, write_edge_list
from .intake import (
    CheckReport,
    StudyData,
    check_study,
    load_study,
    parse_week,
    read_boundaries,
    read_cases,
    read_population,
    read_reference_rates,
    read_standard_population,
    week_bounds,
    week_of,
    week_range,
    weeks_ending,
)
from .explore import explorable_map
from .figures import locator_map, weekly_curve
from .maps import (
    CAUTION_TEXT,
    CLUSTER_COLOURS,
    CLUSTER_STYLE,
    Classification,
    add_map_furniture,
    bivariate_map,
    choropleth,
    classify,
    cluster_map,
    exceedance_map,
    funnel_limits,
    funnel_plot,
    moran_scatterplot,
    natural_breaks,
    ranked_interval_plot,
    raw_beside_smoothed,
    relative_risk_breaks,
    shrinkage_plot,
)
from .models import CarFit, CarPriors, fit_car
from .spacetime import SpaceTimeFit, SpaceTimePriors, fit_spacetime
from .trendplots import plot_district_trends, plot_regional_trend
from .rates import (
    DirectRateResult,
    RateResult,
    RatioResult,
    crude_rate,
    direct_standardized_rate,
    expected_counts,
    poisson_interval,
    rolling_window_sum,
    standardized_ratio,
)
from .scan import SCAN_DIRECTIONS, ScanResult, prospective_scan, scan_map, spatial_scan
from .validation import PreparedRun, RunPlan, prepare_run, validate_run
from .smoothing import (
    PoissonGammaResult,
    SmoothedRates,
    class_changes,
    global_eb_rates,
    local_eb_rates,
    poisson_gamma_eb,
    shrinkage_table,
    spatial_window_rates,
)

__version__ = "0.1.0"

__all__ = [
    "__version__",
    # errors and warnings
    "AreamapError", "AreamapWarning", "ArchiveError", "ConfigError", "DataWarning", "GeometryRepairedWarning",
    "GraphError", "InputError", "ModelError", "ModelWarning", "ParameterError", "SmallNumbersWarning",
    # configuration and intake
    "RunConfig", "load_config", "StudyData", "CheckReport", "load_study", "check_study", "read_boundaries",
    "read_cases", "read_population", "read_reference_rates", "read_standard_population", "parse_week",
    "week_of", "week_bounds", "weeks_ending", "week_range", "write_demo",
    "RunPlan", "PreparedRun", "prepare_run", "validate_run",
    # graphs
    "AreaGraph", "GraphSummary", "build_graph", "read_extra_links", "write_edge_list",
    # rates
    "RatioResult", "RateResult", "DirectRateResult", "expected_counts", "poisson_interval", "standardized_ratio",
    "crude_rate", "direct_standardized_rate", "rolling_window_sum",
    # autocorrelation and clusters
    "CLUSTER_LABELS", "GlobalAutocorrelation", "LocalClusterResult", "morans_i", "gearys_c",
    "eb_standardized_rates", "rate_morans_i", "moran_scatter", "local_clusters", "rate_local_clusters",
    "adjust_pvalues",
    # empirical-Bayes smoothing
    "SmoothedRates", "PoissonGammaResult", "global_eb_rates", "local_eb_rates", "spatial_window_rates",
    "poisson_gamma_eb", "shrinkage_table", "class_changes",
    # maps and figures
    "CAUTION_TEXT", "CLUSTER_COLOURS", "Classification", "classify", "natural_breaks", "relative_risk_breaks",
    "choropleth", "raw_beside_smoothed", "bivariate_map", "exceedance_map", "cluster_map", "funnel_limits",
    "funnel_plot", "moran_scatterplot", "shrinkage_plot", "ranked_interval_plot", "add_map_furniture",
    "CLUSTER_STYLE", "locator_map", "weekly_curve", "explorable_map",
    # scan statistic
    "SCAN_DIRECTIONS", "ScanResult", "spatial_scan", "prospective_scan", "scan_map",
    # CAR models
    "CarPriors", "CarFit", "fit_car",
    "SpaceTimePriors", "SpaceTimeFit", "fit_spacetime", "plot_regional_trend", "plot_district_trends",
    # geostatistical smoothing (risk semivariogram, Poisson kriging)
    "VariogramModel", "RiskVariogram", "risk_variogram", "AreaPoints", "discretize_areas", "PoissonKrigingResult",
    "RiskSurface", "poisson_kriging", "ordinary_kriging", "variogram_plot", "risk_surface_map",
    "SmootherValidation", "cross_validate_smoothers",
    # bulletin and history
    "analyse_period", "PeriodAnalysis", "render_bulletin", "run_bulletin", "BulletinResult", "FlagRules",
    "flag_areas", "suppress_counts", "file_sha256", "load_wording",
    "DISCLOSING_COLUMNS", "public_analysis", "public_table",
    "HistoryArchive", "FlagChanges",
]
