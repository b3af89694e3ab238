"""The samples pages through the real views: the chamber-PC preparation log, the samples list,
a sample's history and surface state, one preparation."""

from __future__ import annotations

import re
from datetime import UTC, datetime, timedelta
from html.parser import HTMLParser

import pytest
from django.test import Client
from django.utils import timezone

from labbook.samples import actions
from labbook.samples.models import Preparation, PreparationStep, Sample
from labbook.samples.steps import DURATION, STEP_KINDS, TEMPERATURE, StepKind

pytestmark = pytest.mark.django_db

CLEAN_CU = [
    {
        "kind": "sputter",
        "gas": "Ar",
        "energy_ev": "1 keV",
        "current_a": "1 uA",
        "beam_area_cm2": 1,
        "duration_s": "10 min",
        "pressure_mbar": "5e-6 mbar",
    },
    {
        "kind": "anneal",
        "temperature_k": "800 K",
        "duration_s": "15 min",
        "method": "resistive",
        "cleans": True,
    },
]


class FormValues(HTMLParser):
    """What a browser submits for one form of a page: text and hidden inputs, checked boxes and
    radios, the selected option of each select, textareas; in document order."""

    def __init__(self, form_id: str):
        super().__init__(convert_charrefs=True)
        self.form_id = form_id
        self.inside = False
        self.values: dict[str, str] = {}
        self._select: str | None = None
        self._first_option: str | None = None
        self._selected = False
        self._textarea: str | None = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "form":
            self.inside = a.get("id") == self.form_id
            return
        if not self.inside:
            return
        name = a.get("name")
        if tag == "input" and name:
            kind = a.get("type", "text")
            if kind in ("checkbox", "radio"):
                if "checked" in a:
                    self.values[name] = a.get("value", "on")
            elif kind not in ("submit", "button"):
                self.values[name] = a.get("value", "")
        elif tag == "select" and name:
            self._select, self._first_option, self._selected = name, None, False
        elif tag == "option" and self._select:
            value = a.get("value", "")
            if self._first_option is None:
                self._first_option = value
            if "selected" in a:
                self.values[self._select] = value
                self._selected = True
        elif tag == "textarea" and name:
            self._textarea = name
            self.values[name] = ""

    def handle_data(self, data):
        if self._textarea:
            self.values[self._textarea] += data

    def handle_endtag(self, tag):
        if tag == "form":
            self.inside = False
        elif tag == "select" and self._select:
            if not self._selected and self._first_option is not None:
                self.values[self._select] = self._first_option
            self._select = None
        elif tag == "textarea":
            self._textarea = None


def form_values(response, form_id: str = "log-form") -> dict[str, str]:
    parser = FormValues(form_id)
    parser.feed(response.content.decode())
    return parser.values


def input_tag(response, element_id: str) -> str:
    match = re.search(
        rf'<(?:input|select)[^>]*\bid="{re.escape(element_id)}"[^>]*>', html(response)
    )
    assert match, f"no input #{element_id} on the page"
    return match.group(0)


def text_of(response, element_id: str) -> str:
    match = re.search(rf'id="{re.escape(element_id)}"[^>]*>([^<]*)<', html(response))
    assert match, f"no element #{element_id} on the page"
    return match.group(1).strip()


def html(response) -> str:
    return response.content.decode()


def as_client(user) -> Client:
    client = Client()
    client.force_login(user)
    return client


@pytest.fixture
def crystal(member):
    return actions.create_sample(name="Cu(111) #3", substrate="Cu(111)", actor=member)


@pytest.fixture
def recipe(member):
    return actions.create_recipe(
        name="Cu(111) clean", substrate="Cu(111)", steps=CLEAN_CU, actor=member
    )


def log_page(client, **params):
    response = client.get("/samples/log/", params)
    assert response.status_code == 200
    return response


# --- the log page --------------------------------------------------------------------------------


def test_log_page_prefills_the_recipe_and_offers_every_step_kind(
    member, instrument, crystal, recipe
):
    page = log_page(as_client(member), sample=crystal.pk, start=f"recipe:{recipe.pk}")
    values = form_values(page)
    # The only instrument and the asked-for sample come preselected; the recipe's steps as typed.
    assert values["instrument"] == str(instrument.pk) and values["sample"] == str(crystal.pk)
    assert values["start"] == values["loaded"] == f"recipe:{recipe.pk}"
    assert values["steps-0-kind"] == "sputter" and values["steps-0-energy_ev"] == "1 keV"
    assert values["steps-0-current_a"] == "1 uA" and values["steps-0-beam_area_cm2"] == "1"
    assert values["steps-1-temperature_k"] == "800 K" and values["steps-1-cleans"] == "1"
    assert "steps-0-cleans" not in values
    # The canonical unit sits beside each quantity input; a default shows as the placeholder.
    unit = re.search(r'id="steps-0-energy_ev-unit">(.*?)</span>\s*</div>', html(page), re.S)
    assert unit and re.sub(r"<[^>]+>", "", unit.group(1)).strip() == "a number alone is in eV"
    assert "steps-0-energy_ev-unit" in input_tag(page, "steps-0-energy_ev")
    assert 'placeholder="default N2"' in input_tag(page, "steps-0-gauge_gas")
    # Start time defaults to now, in the lab's zone, which the page names.
    started = datetime.fromisoformat(values["started_at"]).replace(tzinfo=UTC)
    assert abs(started - timezone.now()) < timedelta(minutes=2)  # TIME_ZONE is UTC in tests
    assert "UTC" in html(page)
    assert values["csrfmiddlewaretoken"]
    for name in STEP_KINDS:
        assert f'name="add" value="{name}"' in html(page)


def test_a_recipe_logged_unchanged_stores_its_derived_doses(member, instrument, crystal, recipe):
    client = as_client(member)
    page = log_page(client, sample=crystal.pk, start=f"recipe:{recipe.pk}")
    response = client.post("/samples/log/", {**form_values(page), "save": "1"})

    preparation = Preparation.objects.get()
    assert response.status_code == 302
    assert response["Location"] == f"/samples/preparations/{preparation.pk}/"
    assert (preparation.recipe, preparation.sample, preparation.operator) == (
        recipe,
        crystal,
        member,
    )
    sputter, anneal = preparation.steps.order_by("position")
    # REFERENCES.md §4: 1 µA for 10 min on 1 cm² gives 3.745×10¹⁵ ions/cm² (Φ = I·t/(e·A),
    # e = 1.602176634×10⁻¹⁹ C, exact since the 2019 SI).
    assert sputter.fluence_per_cm2 == pytest.approx(3.745e15, rel=1e-3)
    assert sputter.raw_input["energy_ev"] == "1 keV" and sputter.energy_ev == 1000.0
    assert anneal.cleans and anneal.temperature_k == 800.0

    shown = client.get(response["Location"])
    message = text_of(shown, "message-0")
    assert "ion fluence 3.74×10¹⁵" in message and "ions/cm²" in message
    assert "followed as written" in html(shown)


def test_the_same_form_sent_twice_is_logged_once(member, instrument, crystal, recipe):
    client = as_client(member)
    values = form_values(log_page(client, sample=crystal.pk, start=f"recipe:{recipe.pk}"))
    assert client.post("/samples/log/", {**values, "save": "1"}).status_code == 302
    again = client.post("/samples/log/", {**values, "save": "1"})
    first = Preparation.objects.get()
    assert again.status_code == 200
    assert "already has a preparation at this time" in html(again)
    assert f'href="/samples/preparations/{first.pk}/"' in html(again)


def test_without_javascript_a_chosen_recipe_is_shown_before_it_is_saved(
    member, instrument, crystal, recipe
):
    client = as_client(member)
    blank = form_values(log_page(client, sample=crystal.pk))
    # Recipe chosen, Enter pressed: its steps were never on the page, so they are put there.
    first = client.post("/samples/log/", {**blank, "start": f"recipe:{recipe.pk}", "save": "1"})
    assert first.status_code == 200 and not Preparation.objects.exists()
    values = form_values(first)
    assert values["loaded"] == f"recipe:{recipe.pk}" and values["steps-0-energy_ev"] == "1 keV"
    assert "Check them, then press Enter" in html(first)
    # Enter again saves them.
    second = client.post("/samples/log/", {**values, "save": "1"})
    assert second.status_code == 302 and Preparation.objects.get().recipe == recipe


def test_bad_values_are_shown_beside_their_fields_and_nothing_is_saved(
    member, instrument, crystal, recipe
):
    client = as_client(member)
    values = form_values(log_page(client, sample=crystal.pk, start=f"recipe:{recipe.pk}"))
    values |= {
        "steps-0-energy_ev": "1 bar",
        "steps-0-current_a": "15 A",
        "steps-0-duration_s": "-5 min",
        "steps-1-notes": "<b>kept</b>",
        "notes": "first try & typo",
    }
    response = client.post("/samples/log/", {**values, "save": "1"})

    assert response.status_code == 200
    assert not Preparation.objects.exists() and not PreparationStep.objects.exists()
    for name, typed, says in (
        ("energy_ev", "1 bar", "cannot be converted to eV"),
        ("current_a", "15 A", "at most 0.001 A"),
        ("duration_s", "-5 min", "more than 0 s"),
    ):
        tag = input_tag(response, f"steps-0-{name}")
        assert f'value="{typed}"' in tag and 'aria-invalid="true"' in tag
        assert f"steps-0-{name}-error" in re.search(r'aria-describedby="([^"]*)"', tag).group(1)
        assert says in text_of(response, f"steps-0-{name}-error")
    # The summary at the top names each field; everything else typed is still there.
    summary = re.search(r'role="alert" id="log-errors">(.*?)</div>', html(response), re.S)
    assert summary and all(
        label in summary.group(1) for label in ("Ion energy", "Ion current", "Duration")
    )
    kept = form_values(response)
    assert kept["steps-1-temperature_k"] == "800 K" and kept["notes"] == "first try & typo"
    assert kept["steps-1-notes"] == "<b>kept</b>" and "<b>kept</b>" not in html(response)
    # Focus goes to the first field in error.
    assert " autofocus" in input_tag(response, "steps-0-energy_ev")


def test_repeat_the_last_preparation_prefills_what_was_typed(member, instrument, crystal):
    first = actions.record_preparation(
        sample=crystal,
        instrument=instrument,
        started_at=timezone.now() - timedelta(days=1),
        steps=[
            {
                "kind": "anneal",
                "thermocouple_mv": "20.644 mV",
                "thermocouple_type": "K",
                "duration_s": "10 min",
                "cleans": True,
            },
            CLEAN_CU[0],
        ],
        actor=member,
    )
    client = as_client(member)
    offered = log_page(client, sample=crystal.pk)
    assert f'value="repeat:{first.pk}"' in html(offered)
    partial = client.get("/samples/log/steps/", {"start": f"repeat:{first.pk}"})
    assert partial.status_code == 200 and 'value="20.644 mV"' in html(partial)

    page = log_page(client, sample=crystal.pk, start=f"repeat:{first.pk}")
    values = form_values(page)
    assert values["steps-0-thermocouple_mv"] == "20.644 mV"
    assert values["steps-0-thermocouple_type"] == "K" and values["steps-1-energy_ev"] == "1 keV"
    response = client.post("/samples/log/", {**values, "save": "1"})
    assert response.status_code == 302
    again = Preparation.objects.exclude(pk=first.pk).get()
    # IEC 60584-1 type K: 20.644 mV is 500 °C with the reference junction at 0 °C.
    assert again.steps.get(position=0).temperature_k == pytest.approx(773.15, abs=0.01)
    assert again.recipe is None


def test_the_sample_last_logged_on_each_instrument_is_remembered(
    member, instrument, other_instrument, recipe
):
    first = actions.create_sample(name="Cu(111) #3", substrate="Cu(111)", actor=member)
    second = actions.create_sample(name="Ag(100) #1", substrate="Ag(100)", actor=member)
    client = as_client(member)
    for inst, sample in ((instrument, first), (other_instrument, second)):
        values = form_values(
            log_page(client, instrument=inst.pk, sample=sample.pk, start=f"recipe:{recipe.pk}")
        )
        assert client.post("/samples/log/", {**values, "save": "1"}).status_code == 302

    # Someone logs another sample on the first instrument elsewhere: this session still
    # remembers what it logged there.
    third = actions.create_sample(name="Au(111) #2", substrate="Au(111)", actor=member)
    actions.record_preparation(
        sample=third,
        instrument=instrument,
        started_at=timezone.now(),
        steps=CLEAN_CU,
        actor=member,
    )
    assert form_values(log_page(client, instrument=instrument.pk))["sample"] == str(first.pk)
    assert form_values(log_page(client, instrument=other_instrument.pk))["sample"] == str(second.pk)
    # With no instrument asked for, the last one used comes back, with its sample.
    plain = form_values(log_page(client))
    assert (plain["instrument"], plain["sample"]) == (str(other_instrument.pk), str(second.pk))
    # Changing the instrument on the page (htmx) brings its remembered sample.
    swapped = client.get(
        "/samples/log/choices/",
        {"which": "instrument", "instrument": instrument.pk, "sample": second.pk},
    )
    assert f'<option value="{first.pk}" selected>' in html(swapped)
    assert 'hx-swap-oob="true"' in html(swapped)


def test_steps_are_added_copied_and_removed_without_javascript(member, instrument, crystal, recipe):
    client = as_client(member)
    values = form_values(log_page(client, sample=crystal.pk, start=f"recipe:{recipe.pk}"))
    values["steps-0-energy_ev"] = "1.5 keV"

    added = client.post("/samples/log/", {**values, "add": "dose"})
    kept = form_values(added)
    kinds = [v for k, v in kept.items() if k.endswith("-kind")]
    assert kinds == ["sputter", "anneal", "dose"] and kept["steps-0-energy_ev"] == "1.5 keV"
    assert "log-errors" not in html(added)  # nothing was checked yet

    copied = form_values(client.post("/samples/log/", {**kept, "copy": "0"}))
    energies = [v for k, v in copied.items() if k.endswith("-energy_ev")]
    assert energies == ["1.5 keV", "1.5 keV"]

    dose_token = next(k for k, v in copied.items() if v == "dose").split("-")[1]
    removed = form_values(client.post("/samples/log/", {**copied, "remove": dose_token}))
    assert [v for k, v in removed.items() if k.endswith("-kind")] == [
        "sputter",
        "anneal",
        "sputter",
    ]
    assert not Preparation.objects.exists()

    response = client.post("/samples/log/", {**removed, "save": "1"})
    assert response.status_code == 302
    preparation = Preparation.objects.get()
    assert [s.kind for s in preparation.steps.order_by("position")] == [
        "sputter",
        "anneal",
        "sputter",
    ]
    page = html(client.get(response["Location"]))
    assert "changed from the recipe" in page and "1 keV → 1.5 keV" in page


def test_ad_hoc_steps_without_javascript(member, instrument, crystal):
    client = as_client(member)
    blank = form_values(log_page(client, sample=crystal.pk))
    added = form_values(client.post("/samples/log/", {**blank, "start": "blank", "add": "dose"}))
    assert added["loaded"] == "blank"
    token = next(k for k, v in added.items() if v == "dose").split("-")[1]
    typed = {f"steps-{token}-gas": "CO", f"steps-{token}-pressure_mbar": "1e-8 mbar"}
    typed[f"steps-{token}-duration_s"] = "100 s"
    response = client.post("/samples/log/", {**added, **typed, "save": "1"})
    assert response.status_code == 302
    dose = Preparation.objects.get().steps.get()
    # REFERENCES.md §2: 1e-6 mbar for 100 s is 75.0 L, so 1e-8 mbar is 0.750 L.
    assert dose.exposure_langmuir == pytest.approx(0.7500617, rel=1e-6)
    assert Preparation.objects.get().recipe is None


def test_a_step_row_of_any_kind_comes_from_the_step_kinds(member, instrument, monkeypatch):
    client = as_client(member)
    row = client.get("/samples/log/step/", {"add": "sputter", "instrument": instrument.pk})
    assert row.status_code == 200
    assert re.search(r'name="steps-[0-9a-f]{8}-energy_ev"', html(row))
    assert " autofocus" in html(row)  # the new row's first field takes the focus

    # A new step kind (DEVELOPERS.md) appears on the page without touching the page's code.
    bake = StepKind(
        "bake",
        "Bake-out",
        {"temperature_k": TEMPERATURE, "duration_s": DURATION},
        lambda values, context: {},
    )
    monkeypatch.setitem(STEP_KINDS, "bake", bake)
    assert 'name="add" value="bake"' in html(log_page(client))
    row = client.get("/samples/log/step/", {"add": "bake"})
    assert re.search(r'name="steps-[0-9a-f]{8}-temperature_k"', html(row))
    assert "Bake-out" in html(row)
    assert client.get("/samples/log/step/", {"add": "nonsense"}).status_code == 404


def test_times_are_read_and_shown_in_the_lab_zone(member, instrument, crystal, settings):
    settings.TIME_ZONE = "Europe/Berlin"
    client = as_client(member)
    values = form_values(log_page(client, sample=crystal.pk))
    step = {
        "steps-0-kind": "other",
        "steps-0-description": "outgassed the holder",
        "steps-0-duration_s": "2 h",
    }
    response = client.post(
        "/samples/log/", {**values, **step, "started_at": "2024-03-04T10:00", "save": "1"}
    )
    assert response.status_code == 302
    preparation = Preparation.objects.get()
    assert preparation.started_at == datetime(2024, 3, 4, 9, 0, tzinfo=UTC)  # CET is UTC+1
    page = html(client.get(response["Location"]))
    assert "2024-03-04 10:00 CET" in page and "2 h" in page

    # A wall-clock time the clocks skip is refused, and named.
    skipped = client.post(
        "/samples/log/", {**values, **step, "started_at": "2024-03-31T02:30", "save": "1"}
    )
    assert skipped.status_code == 200 and "does not exist in Europe/Berlin" in html(skipped)
    assert 'aria-invalid="true"' in input_tag(skipped, "id_started_at")
    assert Preparation.objects.count() == 1


def test_the_form_needs_its_csrf_token(member, instrument, crystal, recipe):
    client = Client(enforce_csrf_checks=True)
    client.force_login(member)
    values = form_values(log_page(client, sample=crystal.pk, start=f"recipe:{recipe.pk}"))
    without = {k: v for k, v in values.items() if k != "csrfmiddlewaretoken"}
    assert client.post("/samples/log/", {**without, "save": "1"}).status_code == 403
    assert client.post("/samples/log/", {**values, "save": "1"}).status_code == 302


# --- samples and preparations --------------------------------------------------------------------


def test_sample_page_shows_its_history_and_surface_state(manager, member, instrument, crystal):
    start = timezone.now() - timedelta(hours=3)
    actions.transfer_sample(
        crystal,
        location="microscope_stage",
        at=start + timedelta(hours=2),
        instrument=instrument,
        actor=member,
    )
    source = actions.add_deposition_source(
        instrument, name="K-cell 1", material="C60", actor=manager
    )
    actions.record_calibration(
        source,
        points=[
            {"duration_s": 60, "coverage_ml": 0.101},
            {"duration_s": 120, "coverage_ml": 0.199},
            {"duration_s": 300, "coverage_ml": 0.502},
        ],
        measured_at=start - timedelta(days=1),
        actor=member,
    )
    preparation = actions.record_preparation(
        sample=crystal,
        instrument=instrument,
        started_at=start,
        steps=CLEAN_CU
        + [
            {"kind": "deposit", "material": "NaCl", "rate_ml_per_min": 0.2, "duration_s": "2 min"},
            {"kind": "deposit", "material": "C60", "source": source.pk, "duration_s": "3 min"},
            {"kind": "dose", "gas": "CO", "pressure_mbar": "1e-8 mbar", "duration_s": "100 s"},
            {"kind": "anneal", "temperature_k": "400 K", "duration_s": "5 min"},
        ],
        actor=member,
    )
    page = as_client(member).get(f"/samples/{crystal.pk}/")
    content = html(page)
    assert page.status_code == 200
    # History: the preparation with every step and its doses, and the transfer.
    assert f"/samples/preparations/{preparation.pk}/" in content
    assert "Preparation on LTM-T" in content and "Moved to the microscope stage" in content
    assert "3.74×10¹⁵" in content and "1.00\u00a0keV" in content
    # Surface now: since the cleaning anneal, NaCl 2 min × 0.2 ML/min = 0.400 ML (typed rate:
    # no uncertainty), C₆₀ from the calibrated source with its uncertainty, CO 0.750 L
    # (REFERENCES.md §2: 1e-6 mbar × 100 s = 75.0 L), and the 5 min anneal after it.
    assert "NaCl 0.400\u00a0ML" in content
    assert re.search(r"C₆₀ 0\.\d+ ± 0\.\d+\u00a0ML", content)
    assert "CO 0.750\u00a0L" in content
    assert "5\u00a0min" in content
    assert f'href="/samples/log/?sample={crystal.pk}"' in content


def test_preparation_page_shows_raw_canonical_and_derived_values(
    member, instrument, crystal, settings
):
    settings.TIME_ZONE = "Europe/Berlin"
    preparation = actions.record_preparation(
        sample=crystal,
        instrument=instrument,
        started_at=datetime(2024, 7, 1, 8, 0, tzinfo=UTC),
        steps=CLEAN_CU
        + [{"kind": "dose", "gas": "CO", "pressure_mbar": "1e-8 mbar", "duration_s": "100 s"}],
        actor=member,
    )
    content = html(as_client(member).get(f"/samples/preparations/{preparation.pk}/"))
    assert "<code>1 keV</code>" in content and "stored 1000 eV" in content
    assert "<code>1 uA</code>" in content and "1.00\u00a0µA" in content
    assert "2024-07-01 10:00 CEST" in content  # summer time, named
    assert "Bo Ferrand" in content and "ad-hoc steps" in content
    assert "Exposure at the gauge reading" in content and "0.750\u00a0L" in content


def test_samples_list_shows_surface_and_last_preparation(member, instrument, crystal):
    other = actions.create_sample(name="Ag(100) #1", substrate="Ag(100)", actor=member)
    preparation = actions.record_preparation(
        sample=crystal,
        instrument=instrument,
        started_at=timezone.now() - timedelta(hours=1),
        steps=CLEAN_CU
        + [{"kind": "deposit", "material": "NaCl", "rate_ml_per_min": 0.2, "duration_s": "2 min"}],
        actor=member,
    )
    content = html(as_client(member).get("/samples/"))
    assert "Cu(111) #3" in content and other.name in content
    assert "Cleaned" in content and "NaCl 0.400\u00a0ML" in content
    assert f"/samples/preparations/{preparation.pk}/" in content
    assert "none yet" in content  # the Ag crystal


def test_members_add_samples_and_a_taken_name_is_refused(member, crystal):
    client = as_client(member)
    response = client.post("/samples/", {"name": "Ag(100) #1", "substrate": "Ag(100)"})
    added = Sample.objects.get(name="Ag(100) #1")
    assert response.status_code == 302 and response["Location"] == f"/samples/{added.pk}/"
    assert added.material == "Ag"

    taken = client.post("/samples/", {"name": "Cu(111) #3", "substrate": "Cu(111)"})
    assert taken.status_code == 200 and Sample.objects.count() == 2
    assert "exists already" in text_of(taken, "id_name-error")
    assert 'aria-invalid="true"' in input_tag(taken, "id_name")
    assert form_values(taken, "new-sample-form")["substrate"] == "Cu(111)"


def test_user_text_is_escaped_everywhere(member, instrument):
    name = "<script>alert(1)</script>"
    sample = actions.create_sample(name=name, substrate="<i>Cu</i>(111)", actor=member)
    preparation = actions.record_preparation(
        sample=sample,
        instrument=instrument,
        started_at=timezone.now(),
        steps=[{"kind": "other", "description": "<img src=x onerror=alert(2)>"}],
        notes="<b>bold</b>",
        actor=member,
    )
    client = as_client(member)
    for url in (
        "/samples/",
        f"/samples/{sample.pk}/",
        f"/samples/log/?sample={sample.pk}",
        f"/samples/preparations/{preparation.pk}/",
    ):
        content = html(client.get(url))
        assert name not in content and "&lt;script&gt;alert(1)&lt;/script&gt;" in content, url
        assert "<i>Cu</i>" not in content and "<img src=x" not in content, url
        assert "<b>bold</b>" not in content, url


@pytest.mark.parametrize(
    "path",
    [
        "/samples/",
        "/samples/{sample}/",
        "/samples/log/",
        "/samples/log/step/?add=sputter",
        "/samples/log/steps/?start=blank",
        "/samples/log/choices/?which=sample",
        "/samples/preparations/{preparation}/",
    ],
)
def test_pages_are_for_lab_members_only(path, member, outsider, instrument, crystal):
    preparation = actions.record_preparation(
        sample=crystal,
        instrument=instrument,
        started_at=timezone.now(),
        steps=CLEAN_CU,
        actor=member,
    )
    url = path.format(sample=crystal.pk, preparation=preparation.pk)
    assert as_client(member).get(url).status_code == 200
    assert as_client(outsider).get(url).status_code == 403
    anonymous = Client().get(url)
    assert anonymous.status_code == 302 and anonymous["Location"].startswith("/login/?next=")


def test_outsiders_cannot_log_or_add(outsider, instrument, crystal, recipe):
    client = as_client(outsider)
    assert client.post("/samples/log/", {"start": f"recipe:{recipe.pk}"}).status_code == 403
    assert client.post("/samples/", {"name": "x", "substrate": "Cu(111)"}).status_code == 403
    assert not Preparation.objects.exists() and Sample.objects.count() == 1
