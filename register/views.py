from django.contrib.auth.decorators import login_required
from django.shortcuts import get_object_or_404, render

from .models import SafetyFunction, TestRecord


@login_required
def home(request):
    sifs = SafetyFunction.objects.for_user(request.user).select_related("unit")[:200]
    return render(request, "register/home.html", {"sifs": sifs})


@login_required
def sif_detail(request, pk):
    sif = get_object_or_404(SafetyFunction.objects.for_user(request.user), pk=pk)
    return render(request, "register/sif_detail.html", {"sif": sif})


@login_required
def test_detail(request, pk):
    record = get_object_or_404(TestRecord.objects.for_user(request.user), pk=pk)
    return render(request, "register/test_detail.html", {"record": record})
