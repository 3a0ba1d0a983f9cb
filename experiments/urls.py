from django.urls import path

from . import measurement_views, views

app_name = "experiments"

urlpatterns = [
    path("", views.index, name="index"),
    path("protocols/<int:pk>/", views.protocol_detail, name="protocol-detail"),
    path("bookings/new/", views.booking_new, name="booking-new"),
    path("bookings/calendar/", views.calendar, name="calendar"),
    path("bookings/<int:pk>/", views.booking_detail, name="booking-detail"),
    path("bookings/<int:pk>/cancel/", views.booking_cancel, name="booking-cancel"),
    path("bookings/<int:pk>/draw/", views.booking_draw, name="booking-draw"),
    path("cohorts/<int:pk>/", views.cohort_detail, name="cohort-detail"),
    path("cohorts/<int:pk>/end/", views.cohort_end, name="cohort-end"),
    path("cohorts/<int:pk>/dishes/new/", views.dish_new, name="dish-new"),
    path("cohorts/<int:pk>/dishes/end/", views.dish_end, name="dish-end"),
    path("dishes/<int:pk>/void/", views.dish_void, name="dish-void"),
    path("studies/new/", views.study_new, name="study-new"),
    path("studies/<slug:code>/", views.study_detail, name="study-detail"),
    path("studies/<slug:code>/unblind/", views.study_unblind, name="study-unblind"),
    path("studies/<slug:code>/trials.csv", views.study_csv, name="study-csv"),
    path("studies/<slug:code>/chart-<slug:kind>.csv", views.study_chart_csv, name="study-chart-csv"),
    path("studies/<slug:code>/chart-<slug:kind>.<slug:fmt>", views.study_chart, name="study-chart"),
    path("studies/<slug:code>/trials/new/", views.trial_new, name="trial-new"),
    path("studies/<slug:code>/slots/<int:slot>/claim/", views.slot_claim, name="slot-claim"),
    path("studies/<slug:code>/slots/<int:slot>/release/", views.slot_release, name="slot-release"),
    path("trials/<int:pk>/", views.trial_detail, name="trial-detail"),
    path("trials/<int:pk>/score/", views.trial_score, name="trial-score"),
    path("trials/<int:pk>/set-aside/<slug:action>/", views.trial_set_aside, name="trial-set-aside"),
    path("trials/<int:pk>/attachments/", views.attachment_add, name="attachment-add"),
    path("attachments/<int:pk>/", views.attachment, name="attachment"),
    path("trials/<int:pk>/measurements/", measurement_views.measurement_new, name="measurement-new"),
    path("measurements/<int:pk>/progress.json", measurement_views.measurement_progress, name="measurement-progress"),
    path("measurements/<int:pk>/chart.<slug:fmt>", measurement_views.measurement_chart, name="measurement-chart"),
    path("measurements/<int:pk>/frames.csv", measurement_views.measurement_csv, name="measurement-csv"),
    path("measurements/<int:pk>/rerun/", measurement_views.measurement_rerun, name="measurement-rerun"),
    path("measurements/<int:pk>/void/", measurement_views.measurement_void, name="measurement-void"),
    path("ledger/", views.ledger, name="ledger"),
    path("ledger.csv", views.ledger_csv, name="ledger-csv"),
]
