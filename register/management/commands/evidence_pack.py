"""Build an evidence pack from the command line (synchronously) and print where it is."""

import datetime as dt
import shutil

from django.contrib.auth import get_user_model
from django.core.exceptions import ValidationError
from django.core.management.base import BaseCommand, CommandError

from register.audit.evidence import request_pack, run
from register.models import EvidencePack, PlantUnit, SafetyFunction, Site
from register.permissions import Action, can


class Command(BaseCommand):
    help = "Build an evidence pack for a site, a unit or one SIF over a period."

    def add_arguments(self, parser):
        parser.add_argument("--site", required=True, help="site code")
        parser.add_argument("--unit", help="unit code (for a unit pack)")
        parser.add_argument("--sif", help="SIF tag (for a one-SIF pack)")
        parser.add_argument("--start", required=True, type=dt.date.fromisoformat)
        parser.add_argument("--end", required=True, type=dt.date.fromisoformat)
        parser.add_argument("--user", required=True,
                            help="username of the person the pack is made for (needs the "
                                 "export right at the site)")
        parser.add_argument("--out", help="copy the zip to this path")

    def handle(self, *args, **o):
        site = Site.objects.filter(code=o["site"]).first()
        if site is None:
            raise CommandError(f"No site with code {o['site']!r}.")
        user = get_user_model().objects.filter(username=o["user"]).first()
        if user is None or not can(user, Action.EXPORT, site.pk):
            raise CommandError("That person may not export from this site.")
        unit = sif = None
        scope = EvidencePack.Scope.SITE
        if o["sif"]:
            sif = SafetyFunction.objects.filter(unit__site=site, tag=o["sif"]).first()
            if sif is None:
                raise CommandError(f"No SIF {o['sif']!r} at this site.")
            scope = EvidencePack.Scope.SIF
        elif o["unit"]:
            unit = PlantUnit.objects.filter(site=site, code=o["unit"]).first()
            if unit is None:
                raise CommandError(f"No unit {o['unit']!r} at this site.")
            scope = EvidencePack.Scope.UNIT
        start, end = (dt.date.fromisoformat(x) if isinstance(x, str) else x
                      for x in (o["start"], o["end"]))  # call_command passes text as is
        try:
            pack = request_pack(user, scope=scope, site=site, unit=unit, sif=sif,
                                period_start=start, period_end=end,
                                build_in_background=False)
        except ValidationError as exc:
            raise CommandError("; ".join(f"{k}: {' '.join(v)}" for k, v in
                                         exc.message_dict.items())) from None
        pack = run(pack.pk)
        from django.conf import settings

        path = settings.VAR_DIR / pack.result_path
        if o["out"]:
            shutil.copyfile(path, o["out"])
            path = o["out"]
        self.stdout.write(f"Pack {pack.pk}: {path} sha256 {pack.result_sha256} "
                          f"(chain head #{pack.chain_head_seq} {pack.chain_head_hash})")
