from django.shortcuts import render
from django.views.decorators.http import require_GET

from colonies.roles import RESEARCHER, role_required


@require_GET
@role_required(RESEARCHER)
def index(request):
    return render(request, "experiments/index.html")
