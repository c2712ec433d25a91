"""Routes of the API, its schema and its documentation page (served without internet)."""

from pathlib import Path

import drf_spectacular_sidecar
from csp.decorators import csp_update
from django.contrib.auth.views import redirect_to_login
from django.urls import include, path
from django.views.static import serve
from drf_spectacular.views import SpectacularAPIView, SpectacularSwaggerSplitView
from rest_framework.routers import DefaultRouter

from register.api import views
from register.middleware_security import static_asset

# Its start-up script is a file of its own (docs/?script), not inline: the page keeps the
# site's Content-Security-Policy, widened only for the data: images of Swagger UI's stylesheet.
_swagger = SpectacularSwaggerSplitView.as_view(url_name="api:schema")


@csp_update({"img-src": ["data:"]})
def docs(request, *args, **kwargs):
    """The documentation page and its start-up script; signed out, the sign-in page (then
    back here), not a bare 401."""
    if not request.user.is_authenticated:
        return redirect_to_login(request.get_full_path())
    return _swagger(request, *args, **kwargs)

router = DefaultRouter()
router.register("sites", views.SiteViewSet, basename="site")
router.register("units", views.UnitViewSet, basename="unit")
router.register("scenarios", views.ScenarioViewSet, basename="scenario")
router.register("sifs", views.SifViewSet, basename="sif")
router.register("subsystems", views.SubsystemViewSet, basename="subsystem")
router.register("components", views.ComponentViewSet, basename="component")
router.register("device-types", views.DeviceTypeViewSet, basename="device-type")
router.register("test-plans", views.TestPlanViewSet, basename="test-plan")
router.register("test-records", views.TestRecordViewSet, basename="test-record")
router.register("demands", views.DemandViewSet, basename="demand")
router.register("bypasses", views.BypassViewSet, basename="bypass")
router.register("deferrals", views.DeferralViewSet, basename="deferral")
router.register("assessments", views.AssessmentViewSet, basename="assessment")
router.register("notifications", views.NotificationViewSet, basename="notification")
router.register("evidence-packs", views.EvidencePackViewSet, basename="evidence-pack")

SWAGGER_ASSETS = Path(drf_spectacular_sidecar.__file__).parent / "static" / \
    "drf_spectacular_sidecar" / "swagger-ui-dist"

app_name = "api"

urlpatterns = [
    path("token/", views.ObtainToken.as_view(), name="token"),
    path("test-results/bulk/", views.BulkTestResults.as_view(), name="bulk-results"),
    path("signing-grant/", views.SigningGrant.as_view(), name="signing-grant"),
    path("schema/", SpectacularAPIView.as_view(), name="schema"),
    path("docs/", docs, name="docs"),
    path("docs/assets/<path:path>", static_asset(serve), {"document_root": SWAGGER_ASSETS},
         name="docs-assets"),
    path("", include(router.urls)),
]
