from django.contrib import admin
from django.contrib.auth import views as auth_views
from django.urls import include, path

from .health import healthz

admin.site.site_header = "Vermilog back office"
admin.site.site_title = "Vermilog"

urlpatterns = [
    path("healthz/", healthz, name="healthz"),
    path("accounts/login/", auth_views.LoginView.as_view(), name="login"),
    path("accounts/logout/", auth_views.LogoutView.as_view(), name="logout"),
    path("admin/", admin.site.urls),
    path("experiments/", include("experiments.urls")),
    path("", include("colonies.urls")),
]
