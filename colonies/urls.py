from django.urls import path

from . import batch_views, deviation_views, health_views, views

app_name = "colonies"

urlpatterns = [
    path("", views.home, name="home"),
    path("round/", views.round_view, name="round"),
    path("round/sw.js", views.round_service_worker, name="round-sw"),
    path("round/<slug:room_code>/", views.round_view, name="round-room"),
    path("husbandry/<slug:kind>/", batch_views.batch_entry, name="batch"),
    path("tanks/", views.tank_list, name="tank-list"),
    path("tanks/labels/", views.tank_labels, name="tank-labels"),
    path("tanks/<str:code>/", views.tank_detail, name="tank-detail"),
    path("tanks/<str:code>/history/", views.tank_history, name="tank-history"),
    path("tanks/<str:code>/add/<slug:kind>/", views.tank_add, name="tank-add"),
    path("tanks/<str:code>/split/", health_views.tank_split, name="tank-split"),
    path("tanks/<str:code>/lineage/", health_views.tank_lineage, name="tank-lineage"),
    path("tanks/<str:code>/health/", health_views.tank_health, name="tank-health"),
    path("tanks/<str:code>/health/plot/", health_views.tank_plot, name="tank-plot"),
    path("tanks/<str:code>/health.csv", health_views.tank_plot_csv, name="tank-plot-csv"),
    path("splits/<int:pk>/void/", health_views.split_void, name="split-void"),
    path("health/", health_views.health_overview_page, name="health-overview"),
    path("health/plot/", health_views.health_overview_plot, name="health-overview-plot"),
    path("health.csv", health_views.health_overview_csv, name="health-overview-csv"),
    path("checks/<int:pk>/", views.check_detail, name="check-detail"),
    path("checks/<int:pk>/edit/", views.check_edit, name="check-edit"),
    path("checks.csv", views.checks_csv, name="checks-csv"),
    path("checks.xlsx", views.checks_xlsx, name="checks-xlsx"),
    path("void/<slug:kind>/<int:pk>/", views.record_void, name="void"),
    path("deviations/", deviation_views.register, name="deviation-register"),
    path("deviations.csv", deviation_views.register_csv, name="deviation-csv"),
    path("deviations/<int:pk>/", deviation_views.detail, name="deviation-detail"),
    path("deviations/<int:pk>/acknowledge/", deviation_views.acknowledge, name="deviation-acknowledge"),
    path("deviations/<int:pk>/close/", deviation_views.close, name="deviation-close"),
    path("species/", views.species_list, name="species-list"),
    path("species/<int:pk>/", views.species_detail, name="species-detail"),
    path("species/<int:pk>/edit/", views.species_edit, name="species-edit"),
]
