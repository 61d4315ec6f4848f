"""The HTML report: every section, one embedded image per figure, nothing loaded from outside,
every text escaped, the run's numbers shown as the run's tables hold them."""

from __future__ import annotations

import base64
import copy
import re
from dataclasses import replace
from html.parser import HTMLParser

import matplotlib
import pandas as pd
import pytest

from regional.report import render_report
from regional.report.html import SECTIONS

matplotlib.use("Agg")

# the PNG signature (reference: PNG specification, ISO/IEC 15948, section 5.2)
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
VOID_TAGS = {"meta", "img", "br", "hr", "link", "input"}


def _png(tag: bytes) -> bytes:
    return PNG_SIGNATURE + tag


def _without_images(page: str) -> str:
    return re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "data:", page)


class _Structure(HTMLParser):
    """Collects tags, checks that every opened element is closed in order, keeps the text."""

    def __init__(self):
        super().__init__()
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.ids: list[str] = []
        self.images: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        attributes = dict(attrs)
        if "id" in attributes:
            self.ids.append(attributes["id"])
        if tag == "img":
            self.images.append(attributes.get("src", ""))
        if tag not in VOID_TAGS:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1:] or 'nothing'}")
        else:
            self.stack.pop()

    def handle_data(self, data):
        self.text.append(data)


def _parse(page: str) -> _Structure:
    parser = _Structure()
    parser.feed(page)
    parser.close()
    return parser


# ---------------------------------------------------------------------------------------------
# Structure


def test_report_has_every_section_with_a_heading(bare_run):
    page = render_report(bare_run, {})
    parsed = _parse(page)
    for key, title in SECTIONS:
        assert key in parsed.ids
        assert re.search(rf'<section id="{key}">\s*<h2>', page)
        assert title in page
    assert parsed.errors == []
    assert parsed.stack == []
    assert page.startswith("<!DOCTYPE html>")


def test_one_embedded_image_per_figure_given(full_run):
    figures = {
        "loo_nse_map": _png(b"map"),
        "nse_cdf": _png(b"cdf"),
        "ungauged_hydrographs": _png(b"bands"),
        "screening": _png(b"bars"),
        "a_new_figure": _png(b"new"),
    }
    parsed = _parse(render_report(full_run, figures))
    assert len(parsed.images) == len(figures)
    decoded = sorted(base64.b64decode(src.split(",", 1)[1]) for src in parsed.images)
    assert decoded == sorted(figures.values())
    assert all(src.startswith("data:image/png;base64,") for src in parsed.images)


def test_figures_sit_in_their_sections(full_run):
    page = render_report(full_run, {"ungauged_mean_flow_map": _png(b"m"), "nse_cdf": _png(b"c")})
    ungauged = page.index('<section id="ungauged">')
    screening = page.index('<section id="screening">')
    figures = page.index('<section id="figures">')
    assert ungauged < page.index('id="figure-ungauged_mean_flow_map"') < screening
    assert figures < page.index('id="figure-nse_cdf"') < ungauged


def test_report_with_real_figures_embeds_them_all(full_run):
    import io

    from regional.report import make_figures

    images = {}
    for name, fig in make_figures(full_run).items():
        buffer = io.BytesIO()
        fig.savefig(buffer, format="png", dpi=20)
        images[name] = buffer.getvalue()
    parsed = _parse(render_report(full_run, images))
    assert len(parsed.images) == len(images)


def test_report_loads_nothing_from_outside(full_run):
    page = render_report(full_run, {"nse_cdf": _png(b"x")})
    assert "http://" not in page
    assert "https://" not in page
    assert "<script" not in page.lower()
    assert "<link" not in page.lower()
    assert "@import" not in page
    assert "url(" not in page
    sources = re.findall(r'src="([^"]*)"', page)
    assert sources and all(s.startswith("data:image/png;base64,") for s in sources)


# ---------------------------------------------------------------------------------------------
# Escaping


def test_basin_names_are_escaped(full_run):
    region = full_run.region
    basins = region.basins.copy()
    evil = "<script>alert('x')</script> & Sons"
    basins["name"] = [f"Brook {i}" for i in range(len(basins))]
    basins.loc[region.ungauged[0], "name"] = evil
    basins.loc[region.gauged[0], "name"] = evil
    run = replace(full_run, region=replace(region, basins=basins))
    page = render_report(run, {})
    assert "<script>" not in page
    assert "&lt;script&gt;alert(&#x27;x&#x27;)&lt;/script&gt; &amp; Sons" in page
    assert evil in "".join(_parse(page).text)  # the reader sees the name as written


def test_region_name_and_messages_are_escaped(bare_run):
    settings = bare_run.settings
    run = replace(
        bare_run,
        settings=replace(settings, region=replace(settings.region, name='Vale <b>"A"</b>')),
        warnings=("precip < 0 at <B01> & 3 more",),
    )
    page = render_report(run, {})
    assert "<b>" not in page
    assert "Vale &lt;b&gt;&quot;A&quot;&lt;/b&gt;" in page
    assert "precip &lt; 0 at &lt;B01&gt; &amp; 3 more" in page


# ---------------------------------------------------------------------------------------------
# Content


def test_summary_names_the_choice_and_its_skill(bare_run):
    page = render_report(bare_run, {})
    summary = page[page.index('id="summary"') : page.index('id="cautions"')]
    rows = bare_run.summary[bare_run.summary["model"] == bare_run.chosen_model].set_index("method")
    assert bare_run.chosen_model in summary
    assert bare_run.chosen_method in summary
    for method in (bare_run.chosen_method, "calibrated", "median"):
        assert f"{rows.loc[method, 'median_nse']:.3g}" in summary
    assert f"{len(bare_run.region.gauged)} gauged" in summary


def test_cautions_defer_safety_decisions(bare_run):
    page = render_report(bare_run, {})
    cautions = page[page.index('id="cautions"') : page.index('id="inputs"')]
    assert "large uncertainty" in cautions
    assert "floods, dam safety, water supply" in cautions
    assert "licensed professional practice" in cautions


def test_transfer_table_per_model_with_the_chosen_row_marked(bare_run):
    page = render_report(bare_run, {})
    transfer = page[page.index('id="transfer"') : page.index('id="regression"')]
    for model in bare_run.runs:
        assert f"Model {model}" in transfer
    assert transfer.count('<tr class="chosen">') == 1
    chosen_row = transfer.split('<tr class="chosen">', 1)[1].split("</tr>", 1)[0]
    assert f"<td>{bare_run.chosen_method}</td>" in chosen_row


def test_regression_section_shows_fit_and_vif_warning(bare_run):
    model = "linear"
    regression = copy.copy(bare_run.runs[model].regression)
    collinear = regression.coefficients_.iloc[[0]].assign(term="aridity", vif=12.5)
    collinear["vif_warning"] = True
    regression.coefficients_ = pd.concat([regression.coefficients_, collinear])
    runs = dict(bare_run.runs)
    runs[model] = replace(runs[model], regression=regression)
    page = render_report(replace(bare_run, runs=runs), {})
    section = page[page.index('id="regression"') : page.index('id="figures"')]
    assert f"{bare_run.runs[model].regression.r2_.iloc[0]:.3g}" in section
    assert "VIF above 10 for" in section
    assert "VIF 12.5" in section


def test_missing_prediction_and_screening_are_explained(bare_run):
    page = render_report(bare_run, {})
    ungauged = page[page.index('id="ungauged"') : page.index('id="screening"')]
    screening = page[page.index('id="screening"') : page.index('id="warnings"')]
    assert "No estimates at ungauged basins: prediction did not run" in ungauged
    assert "No candidate gauge sites were ranked: screening did not run" in screening


def test_ungauged_estimates_show_intervals_skill_and_flags(full_run):
    prediction = full_run.prediction
    page = render_report(full_run, {})
    section = page[page.index('id="ungauged"') : page.index('id="screening"')]
    table = prediction.table
    for basin in table.index:
        assert f"<td>{basin}</td>" in section
    first = table.index[0]
    parameter = "x1_mm" if prediction.model == "gr4j" else "k_per_day"
    low, value, high = (table.loc[first, f"{parameter}{s}"] for s in ("_low", "", "_high"))
    assert f"{value:.3g} ({low:.3g}\u2013{high:.3g})" in section
    assert section.count('<td class="flag">no</td>') >= int((~table["applicable"]).sum())
    chosen = prediction.coverage[prediction.coverage["method"] == prediction.method]
    assert f"{chosen['coverage'].iloc[0]:.3g}" in section
    assert "nominal 0.9" in section


def test_screening_table_in_rank_order(full_run):
    page = render_report(full_run, {})
    section = page[page.index('id="screening"') : page.index('id="warnings"')]
    positions = [section.index(f"<td>{basin}</td>") for basin in full_run.screening.table.index]
    assert positions == sorted(positions)


def test_every_warning_and_note_listed_once(full_run):
    run = replace(
        full_run,
        warnings=("first warning", "second warning", full_run.prediction.notes[0]),
    )
    page = render_report(run, {})
    section = page[page.index('id="warnings"') : page.index('id="methods"')]
    for message in ("first warning", "second warning", *run.prediction.notes):
        assert section.count(message) == 1
    for note in run.screening.notes:
        assert note in section


def test_references_are_cited(full_run):
    page = render_report(full_run, {})
    section = page[page.index('id="methods"') : page.index('id="run"')]
    for author in (
        "Nash",
        "Gupta",
        "Klemes",
        "Oudin",
        "Vovk",
        "Lei",
        "Mahalanobis",
        "Sherman",
        "Perrin",
        "Chow",
    ):
        assert author in section


def _one_model(result, model):
    return replace(
        result,
        runs={model: result.runs[model]},
        summary=result.summary[result.summary["model"] == model],
        chosen_model=model,
    )


def _methods_section(result) -> str:
    page = render_report(result, {})
    return page[page.index('id="methods"') : page.index('id="run"')]


def test_methods_of_a_gr4j_run_name_gr4j_and_cite_perrin_2003(bare_run):
    section = _methods_section(_one_model(bare_run, "gr4j"))
    assert "Storage model gr4j" in section
    assert "GR4J: a daily model of four parameters" in section
    assert "Perrin, C., Michel, C., Andreassian, V. (2003)" in section
    assert "Linear reservoir" not in section
    assert "Chow" not in section


def test_methods_of_a_linear_run_name_the_linear_store(bare_run):
    section = _methods_section(_one_model(bare_run, "linear"))
    assert "Storage model linear" in section
    assert "Linear reservoir: one store S (mm) with dS/dt = P - E - kS" in section
    assert "Chow, V. T., Maidment, D. R., Mays, L. W. (1988)" in section
    assert "GR4J" not in section
    assert "Andreassian, V. (2003)" not in section  # Perrin also co-wrote Oudin et al. 2008


def test_methods_name_exactly_the_transfer_methods_run(bare_run):
    section = _methods_section(bare_run)
    methods = set(bare_run.runs[bare_run.chosen_model].loo.methods) - {"calibrated"}
    for method in ("regression", "similarity", "proximity", "median"):
        assert (f"Transfer method {method}." in section) == (method in methods), method
    assert "Screening" not in section  # screening did not run in this result


def test_run_information_lists_timings_and_versions(bare_run):
    page = render_report(bare_run, {})
    section = page[page.index('id="run"') :]
    for stage in bare_run.timings:
        assert f"<td>{stage}</td>" in section
    assert matplotlib.__version__ in section


def test_numbers_are_rounded(full_run):
    text = _without_images(render_report(full_run, {}))
    cells = re.findall(r'<td class="num">([^<]*)</td>', text)
    assert cells
    decimals = [c for c in cells if "." in c]
    assert decimals
    mantissas = [re.sub(r"e.*$", "", c).lstrip("-").replace(".", "").lstrip("0") for c in decimals]
    assert max(len(m) for m in mantissas) <= 3  # three significant digits at most


@pytest.mark.parametrize("value, text", [(0.94164, "0.942"), (1234.5, "1,234"), (3, "3")])
def test_cell_format(value, text):
    from regional.report.html import _fmt

    assert _fmt(value) == text


def test_report_of_the_demo_region_with_its_real_prediction_and_screening(demo_result):
    import io

    from regional.report import make_figures

    images = {}
    for name, fig in make_figures(demo_result).items():
        buffer = io.BytesIO()
        fig.savefig(buffer, format="png", dpi=20)
        images[name] = buffer.getvalue()
    assert {"ungauged_mean_flow_map", "ungauged_hydrographs", "screening"} <= set(images)
    page = render_report(demo_result, images)
    parsed = _parse(page)
    assert parsed.errors == []
    assert len(parsed.images) == len(images)
    section = page[page.index('id="ungauged"') : page.index('id="screening"')]
    for basin in demo_result.region.ungauged:
        assert f"<td>{basin}</td>" in section


# ---------------------------------------------------------------------------------------------
# Tables: readable headers with units, estimates at the sites in the report's unit


def _headers(section: str) -> list[tuple[str, str]]:
    """(machine name, shown text) of every header cell of a part of the page."""
    cells = re.findall(r'<th scope="col" title="([^"]*)">(.*?)</th>', section)
    return [(name, re.sub(r"<[^>]+>", " ", text).strip()) for name, text in cells]


def test_headers_are_readable_with_units_and_keep_the_machine_name(bare_run):
    page = render_report(bare_run, {})
    transfer = page[page.index('id="transfer"') : page.index('id="regression"')]
    headers = dict(_headers(transfer))
    assert headers["share_nse_gt_0_5"] == "Share with NSE &gt; 0.5 -"
    assert headers["median_nse"] == "Median NSE -"
    assert headers["n_basins"] == "Basins count"
    assert all(name != text for name, text in headers.items() if "_" in name)


def test_attribute_ranges_carry_units(bare_run):
    page = render_report(bare_run, {})
    inputs = page[page.index('id="inputs"') : page.index('id="calibration"')]
    assert "<td>Area (area_km2)</td><td>km2</td>" in inputs
    for attribute in bare_run.attributes:
        assert f"({attribute})</td>" in inputs


def test_wide_tables_keep_their_first_column_and_wrap_text():
    from regional.report.html import STYLE

    assert "position: sticky" in STYLE
    assert "td.text { white-space: normal" in STYLE


def _site_rows(page: str) -> dict[str, list[str]]:
    section = page[page.index('id="site-estimates"') :]
    section = section[: section.index("</table>")]
    rows = re.findall(r"<tr>(.*?)</tr>", section)[1:] or re.findall(
        r"<tr[^>]*>(.*?)</tr>", section
    )
    cells = [re.findall(r"<td[^>]*>(.*?)</td>", row) for row in rows]
    return {row[0]: row for row in cells if row}


def test_site_estimates_show_estimate_bounds_unit_and_reason(full_run):
    page = render_report(full_run, {})
    rows = _site_rows(page)
    table = full_run.prediction.table
    assert set(rows) == set(full_run.region.ungauged)
    for basin, row in rows.items():
        assert "m3/s" in row
        assert any("\u2013" in cell for cell in row)
        assert row[-1] == html_escape(table.loc[basin, "reason"])


def html_escape(text: str) -> str:
    import html

    return html.escape(text, quote=True)


def test_site_estimates_in_m3s_agree_with_the_prediction_table(demo_result):
    # two routes: the report converts mm/day through the area; predict wrote mean_flow_m3s
    page = render_report(demo_result, {})
    rows = _site_rows(page)
    table = demo_result.prediction.table
    for basin, row in rows.items():
        shown = float(row[2])  # basin, name, mean flow
        assert shown == pytest.approx(table.loc[basin, "mean_flow_m3s"], rel=5e-3)


def test_site_estimates_in_mm_per_day_when_asked(full_run):
    settings = replace(
        full_run.settings, report=replace(full_run.settings.report, flow_unit="mm/day")
    )
    page = render_report(replace(full_run, settings=settings), {})
    rows = _site_rows(page)
    table = full_run.prediction.table
    flows = full_run.prediction.flows.groupby("basin_id")[["flow_low_mm", "flow_high_mm"]].mean()
    for basin, row in rows.items():
        assert "mm/day" in row
        assert f"{table.loc[basin, 'mean_flow_mm']:.3g}" in row
        low, high = flows.loc[basin]
        assert f"{low:.3g}\u2013{high:.3g}" in row
    assert "Flow statistics (mm/day)" in page


def test_statistics_section_shows_the_runs_estimates_as_copyable_text(tiny_run):
    # Two routes to the same numbers: the tab-separated text in the report against the run's
    # statistics_ungauged table (flows in the report's unit, m3/s by default).
    import html as html_module

    from regional.report import statistics as statistics_report

    page = render_report(tiny_run, {})
    section = page[page.index('<section id="statistics">') :]
    section = section[: section.index("</section>")]
    assert "Skill of each statistic in leave-one-out" in section
    text = html_module.unescape(section[section.index("<pre>") + 5 : section.index("</pre>")])
    rows = [line.split("\t") for line in text.splitlines()]
    assert rows[0][:7] == ["basin_id", "statistic", "estimate", "low", "high", "unit", "route"]
    table = tiny_run.statistics.ungauged.set_index(["basin_id", "statistic"])
    unit = tiny_run.settings.report.flow_unit
    checked = 0
    for basin, label, estimate, *_ in rows[1:]:
        name = next(
            n for n in table.index.get_level_values(1) if statistics_report.describe(n) == label
        )
        row = table.loc[(basin, name)]
        column = "estimate_m3s" if row["unit"] == "mm/day" and unit == "m3/s" else "estimate"
        if estimate:
            assert float(estimate) == pytest.approx(row[column], rel=1e-3)
            checked += 1
    assert checked > 0
    assert len(rows) - 1 == len(table)
