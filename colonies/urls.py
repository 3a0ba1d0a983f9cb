from django.urls import path

from . import deviation_views, views

app_name = "colonies"

urlpatterns = [
    path("", views.home, name="home"),
    path("round/", views.round_view, name="round"),
    path("round/<slug:room_code>/", views.round_view, name="round-room"),
    path("tanks/", views.tank_list, name="tank-list"),
    path("tanks/<str:code>/", views.tank_detail, name="tank-detail"),
    path("tanks/<str:code>/history/", views.tank_history, name="tank-history"),
    path("tanks/<str:code>/add/<slug:kind>/", views.tank_add, name="tank-add"),
    path("checks/<int:pk>/", views.check_detail, name="check-detail"),
    path("checks/<int:pk>/edit/", views.check_edit, name="check-edit"),
    path("checks.csv", views.checks_csv, name="checks-csv"),
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
