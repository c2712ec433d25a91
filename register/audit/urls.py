from django.urls import path

from register.audit import views as v

app_name = "audit"

urlpatterns = [
    path("chain/", v.chain, name="chain"),
    path("chain/verify/", v.chain_verify_full, name="chain_verify_full"),
    path("packs/", v.packs, name="packs"),
    path("packs/<int:pk>/", v.pack_detail, name="pack_detail"),
    path("packs/<int:pk>/status.json", v.pack_status, name="pack_status"),
    path("packs/<int:pk>/download/", v.pack_download, name="pack_download"),
    path("sifs/<int:pk>/as-of/", v.sif_as_of, name="sif_as_of"),
]
