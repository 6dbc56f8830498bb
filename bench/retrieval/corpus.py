"""The Marrowby Cycle Works corpus for the retrieval question set.

``write_corpus(dest)`` writes every document below ``dest`` and returns the paths it wrote, sorted.
The output is byte-for-byte the same on every run:

* Markdown, plain text, HTML, WebVTT and SRT documents are stored as files under ``docs/`` next to
  this module and copied as bytes.
* PDF and Word documents are built from the Python data at the bottom of this module, PDFs with
  fpdf2 (fixed creation date, one ``add_page`` per designed page) and Word files with python-docx
  (fixed core properties, zip entries rewritten with a fixed timestamp).

Marrowby Cycle Works, its people, products, part numbers, suppliers and carriers are invented.
"""

from __future__ import annotations

import io
import zipfile
from datetime import UTC, datetime
from pathlib import Path

DOCS_DIR = Path(__file__).resolve().with_name("docs")
FIXED_DATE = datetime(2026, 1, 1, tzinfo=UTC)
_ZIP_DATE = (2026, 1, 1, 0, 0, 0)
_AUTHOR = "Marrowby Cycle Works"


def write_corpus(dest: Path) -> list[Path]:
    """Write all documents below ``dest`` (created if needed); return the written paths, sorted."""
    dest = Path(dest)
    written: list[Path] = []
    for src in sorted(p for p in DOCS_DIR.rglob("*") if p.is_file()):
        rel = src.relative_to(DOCS_DIR)
        out = dest / rel
        out.parent.mkdir(parents=True, exist_ok=True)
        out.write_bytes(src.read_bytes())
        written.append(out)
    for rel, spec in PDFS.items():
        out = dest / rel
        out.parent.mkdir(parents=True, exist_ok=True)
        out.write_bytes(_render_pdf(spec))
        written.append(out)
    for rel, spec in DOCXS.items():
        out = dest / rel
        out.parent.mkdir(parents=True, exist_ok=True)
        out.write_bytes(_render_docx(spec))
        written.append(out)
    return sorted(written)


# --------------------------------------------------------------------------------------------
# PDF rendering
# --------------------------------------------------------------------------------------------
# A PDF spec is {"title": str, "code": str, "pages": [[block, ...], ...]}. Blocks:
#   ("h1", text)   document title          ("h2", text)  section heading
#   ("h3", text)   sub-heading             ("p", text)   paragraph
#   ("li", text)   bullet item             ("table", widths, rows)  first row is the header


def _render_pdf(spec: dict) -> bytes:
    from fpdf import FPDF

    title, code = spec["title"], spec["code"]

    class _Doc(FPDF):
        def header(self) -> None:
            self.set_font("Helvetica", "", 8)
            self.set_text_color(110, 110, 110)
            self.cell(0, 5, f"Marrowby Cycle Works  |  {title}", new_x="LMARGIN", new_y="NEXT")
            self.ln(3)
            self.set_text_color(0, 0, 0)

        def footer(self) -> None:
            self.set_y(-14)
            self.set_font("Helvetica", "", 8)
            self.set_text_color(110, 110, 110)
            self.cell(0, 5, f"{code}    Page {self.page_no()} of {{nb}}", align="C")
            self.set_text_color(0, 0, 0)

    pdf = _Doc(format="A4")
    pdf.set_creation_date(FIXED_DATE)
    pdf.set_title(title)
    pdf.set_author(_AUTHOR)
    pdf.set_subject(code)
    pdf.set_margins(20, 15, 20)
    pdf.set_auto_page_break(True, margin=18)
    for number, blocks in enumerate(spec["pages"], start=1):
        pdf.add_page()
        for block in blocks:
            _pdf_block(pdf, block)
        if pdf.page_no() != number:
            raise ValueError(f"{title}: designed page {number} overflowed onto another page")
    return bytes(pdf.output())


def _pdf_block(pdf, block: tuple) -> None:
    kind = block[0]
    width = pdf.epw
    if kind == "h1":
        pdf.set_font("Helvetica", "B", 16)
        pdf.multi_cell(width, 8, block[1], new_x="LMARGIN", new_y="NEXT")
        pdf.ln(2)
    elif kind == "h2":
        pdf.ln(2)
        pdf.set_font("Helvetica", "B", 12.5)
        pdf.multi_cell(width, 6.5, block[1], new_x="LMARGIN", new_y="NEXT")
        pdf.ln(1)
    elif kind == "h3":
        pdf.ln(1)
        pdf.set_font("Helvetica", "B", 10.5)
        pdf.multi_cell(width, 5.5, block[1], new_x="LMARGIN", new_y="NEXT")
    elif kind == "p":
        pdf.set_font("Helvetica", "", 10)
        pdf.multi_cell(width, 5, block[1], new_x="LMARGIN", new_y="NEXT")
        pdf.ln(2)
    elif kind == "li":
        pdf.set_font("Helvetica", "", 10)
        pdf.set_x(pdf.l_margin + 4)
        pdf.multi_cell(width - 4, 5, "-  " + block[1], new_x="LMARGIN", new_y="NEXT")
        pdf.ln(0.8)
    elif kind == "table":
        widths, rows = block[1], block[2]
        pdf.set_font("Helvetica", "", 9)
        with pdf.table(
            col_widths=widths, text_align="LEFT", line_height=4.6, first_row_as_headings=True
        ) as table:
            for row in rows:
                cells = table.row()
                for value in row:
                    cells.cell(value)
        pdf.ln(3)
    else:
        raise ValueError(f"unknown PDF block {kind!r}")


# --------------------------------------------------------------------------------------------
# DOCX rendering
# --------------------------------------------------------------------------------------------
# A DOCX spec is {"title": str, "blocks": [...]}. Blocks:
#   ("h1"|"h2"|"h3", text)  paragraphs in the built-in styles "Heading 1".."Heading 3"
#   ("p", text)             body paragraph          ("bullet", text)  "List Bullet"
#   ("steps", [text, ...])  "List Number" paragraphs, numbering restarted at 1 for each list
#   ("table", rows)         "Table Grid" table, first row bold as the header


def _render_docx(spec: dict) -> bytes:
    import docx

    doc = docx.Document()
    props = doc.core_properties
    props.author = _AUTHOR
    props.last_modified_by = _AUTHOR
    props.title = spec["title"]
    props.subject = ""
    props.comments = ""
    props.keywords = ""
    props.revision = 1
    props.created = FIXED_DATE.replace(tzinfo=None)
    props.modified = FIXED_DATE.replace(tzinfo=None)
    props.last_printed = FIXED_DATE.replace(tzinfo=None)
    for block in spec["blocks"]:
        kind = block[0]
        if kind in ("h1", "h2", "h3"):
            doc.add_paragraph(block[1], style=f"Heading {kind[1]}")
        elif kind == "p":
            doc.add_paragraph(block[1])
        elif kind == "bullet":
            doc.add_paragraph(block[1], style="List Bullet")
        elif kind == "steps":
            num_id = _new_numbering(doc)
            for text in block[1]:
                para = doc.add_paragraph(text, style="List Number")
                num_pr = para._p.get_or_add_pPr().get_or_add_numPr()
                num_pr.get_or_add_ilvl().val = 0
                num_pr.get_or_add_numId().val = num_id
        elif kind == "table":
            rows = block[1]
            table = doc.add_table(rows=len(rows), cols=len(rows[0]))
            table.style = "Table Grid"
            for r, row in enumerate(rows):
                for c, value in enumerate(row):
                    cell = table.cell(r, c)
                    cell.text = value
                    if r == 0:
                        for run in cell.paragraphs[0].runs:
                            run.bold = True
        else:
            raise ValueError(f"unknown DOCX block {kind!r}")
    raw = io.BytesIO()
    doc.save(raw)
    return _normalise_zip(raw.getvalue())


def _new_numbering(doc) -> int:
    """A fresh w:num for the "List Number" list so that each list of steps starts at 1."""
    from docx.oxml import OxmlElement
    from docx.oxml.ns import qn

    base_id = doc.styles["List Number"].element.pPr.numPr.numId.val
    numbering = doc.part.numbering_part.element
    nums = numbering.findall(qn("w:num"))
    abstract_id = next(
        n.find(qn("w:abstractNumId")).get(qn("w:val"))
        for n in nums
        if n.get(qn("w:numId")) == str(base_id)
    )
    new_id = max(int(n.get(qn("w:numId"))) for n in nums) + 1
    num = OxmlElement("w:num")
    num.set(qn("w:numId"), str(new_id))
    abstract = OxmlElement("w:abstractNumId")
    abstract.set(qn("w:val"), abstract_id)
    num.append(abstract)
    override = OxmlElement("w:lvlOverride")
    override.set(qn("w:ilvl"), "0")
    start = OxmlElement("w:startOverride")
    start.set(qn("w:val"), "1")
    override.append(start)
    num.append(override)
    numbering.append(num)
    return new_id


def _normalise_zip(data: bytes) -> bytes:
    """Rewrite a zip with fixed entry timestamps and permissions so that its bytes are stable."""
    out = io.BytesIO()
    with (
        zipfile.ZipFile(io.BytesIO(data)) as src,
        zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as dst,
    ):
        for info in src.infolist():
            entry = zipfile.ZipInfo(info.filename, date_time=_ZIP_DATE)
            entry.compress_type = zipfile.ZIP_DEFLATED
            entry.external_attr = 0o644 << 16
            dst.writestr(entry, src.read(info.filename))
    return out.getvalue()


# --------------------------------------------------------------------------------------------
# Document data: PDFs
# --------------------------------------------------------------------------------------------

_HB2_MANUAL = {
    "title": "HB2 Hydraulic Disc Brake Service Manual",
    "code": "SM-HB2 revision D, 2025-07-01",
    "pages": [
        [
            ("h1", "HB2 Hydraulic Disc Brake - Service Manual"),
            (
                "p",
                "Revision D, issued 2025-07-01 by quality engineering. This revision replaces "
                "revision C and includes the caliper mounting bolt change made by engineering "
                "change notice ECN-0141 and the lever pivot pin rework from safety notice "
                "SN-2025-03.",
            ),
            ("h2", "About this manual"),
            (
                "p",
                "For trained mechanics at Marrowby Cycle Works and at our dealers: inspection, "
                "pads, bleeding, hoses, caliper alignment and fault finding on the HB2 hydraulic "
                "disc brake, as fitted to the Halden E, the Cobble Plus and the Tern 700 disc. "
                "Riders should not attempt this work.",
            ),
            ("h2", "How the HB2 works"),
            (
                "p",
                "Squeezing the lever pushes a master piston in the lever body. The piston moves "
                "mineral fluid along the hose to the caliper, where two opposed pistons press "
                "the pads onto the rotor. A reservoir in the lever takes up the change in fluid "
                "volume as the pads wear, so the bite point stays the same for the life of the "
                "pads. The system is sealed: if the bite point moves, something is wrong and "
                "must be found.",
            ),
            ("h2", "Main parts"),
            (
                "table",
                (52, 68, 50),
                [
                    ("Part number", "Description", "Notes"),
                    (
                        "MCW-HB2-LEV-03",
                        "Lever assembly, left or right",
                        "Check lot number, SN-2025-03",
                    ),
                    ("MCW-HB2-CAL-07", "Caliper, two-piston", "Front and rear identical"),
                    (
                        "MCW-HB2-HOSE-1200",
                        "Front hose, 1200 mm, cut to length",
                        "Supplied by Oxbeck Hydraulics",
                    ),
                    (
                        "MCW-HB2-HOSE-1800",
                        "Rear hose, 1800 mm, cut to length",
                        "Supplied by Oxbeck Hydraulics",
                    ),
                    ("MCW-HB2-OLV-05", "Compression olive", "New olive every time a hose is cut"),
                    ("MCW-HB2-INS-05", "Hose insert, brass", "New insert every time a hose is cut"),
                    ("MCW-HB2-PAD-R", "Pads, resin compound", "Cobble Plus and Tern 700"),
                    ("MCW-HB2-PAD-S", "Pads, sintered compound", "Halden E"),
                    ("MCW-ROT-160 / MCW-ROT-180", "Rotor, 160 mm or 180 mm", "Six-bolt"),
                    (
                        "MCW-FLD-M5-100",
                        "Hydro Fluid M5, 100 ml",
                        "The only fluid allowed in an HB2",
                    ),
                ],
            ),
        ],
        [
            ("h2", "Pads and rotors"),
            ("h3", "Choosing the pad compound"),
            (
                "p",
                "Resin pads are quiet, bite well from cold and are gentle on rotors. They are "
                "the standard fit on the Cobble Plus and the Tern 700. Sintered pads are harder "
                "wearing and keep their power when hot, so they are the standard fit on the "
                "Halden E, which is heavier and is often ridden fast downhill with assist. A "
                "customer who rides long mountain descents on a loaded Tern 700 may ask for "
                "sintered pads; they will be noisier in the wet.",
            ),
            ("h3", "Wear limits"),
            (
                "p",
                "Replace the pads when the friction material on either pad is thinner than 1.0 "
                "mm, or when pad and backing plate together measure less than 2.5 mm. Always "
                "replace both pads in a caliper together. A new rotor is 1.8 mm thick. Replace "
                "the rotor when it measures 1.6 mm or less at any point on the braking track, or "
                "if it has a step worn into it that you can feel with a fingernail. Measure with "
                "the micrometer, not the vernier calipers.",
            ),
            ("h3", "Replacing pads"),
            (
                "p",
                "Remove the wheel. Pull out the pad retaining pin clip and slide the pin out, "
                "then lift the pads and the spreader spring out through the top of the caliper. "
                "Push the pistons fully back with the plastic piston press; never use a "
                "screwdriver, which can chip the piston face. Clean the caliper body with "
                "alcohol. Fit the new pads with the spring between them, refit the pin and the "
                "clip, and refit the wheel. Pump the lever until the pads meet the rotor.",
            ),
            ("h3", "Bedding in new pads"),
            (
                "p",
                "New pads and rotors must be bedded in before the bike goes back to the "
                "customer. In the yard, ride at about 20 km/h and brake firmly to walking pace, "
                "without locking the wheel, twenty times on each brake. Then ride one gentle lap "
                "to let the rotors cool. Skipping the bed-in is the most common cause of squeal "
                "and weak braking after a pad change.",
            ),
        ],
        [
            ("h2", "Bleeding the HB2"),
            (
                "p",
                "Bleed the brake whenever a hose has been shortened or replaced, a fitting has "
                "been opened, or the lever feels soft and does not come back to a firm bite "
                "point. Change the fluid every two years as part of a service, or every year for "
                "riders who cover more than 5,000 km a year. Mechanics may bleed an HB2 only "
                "after being signed off for hydraulic brake work.",
            ),
            ("h3", "Tools and fluid"),
            (
                "li",
                "Bleed kit MCW-TK-BLD-02: two syringes, the lever bleed bag, hose clamps and "
                "adaptors.",
            ),
            (
                "li",
                "Bleed block MCW-TK-BLK-01: the yellow 5 mm block that replaces the pads in the "
                "caliper.",
            ),
            (
                "li",
                "Hydro Fluid M5, MCW-FLD-M5-100. Never use any other fluid. DOT fluid destroys "
                "the seals.",
            ),
            ("li", "Digital angle gauge, nitrile gloves, alcohol and clean cloths."),
            ("h3", "Procedure"),
            (
                "p",
                "1. Remove the wheel and the pads, and fit the yellow bleed block in the caliper.",
            ),
            (
                "p",
                "2. Set the lever so that the reservoir is level, checked with the angle gauge "
                "on the lever body, and remove the reservoir bleed screw. Fit the bleed bag to "
                "the lever.",
            ),
            (
                "p",
                "3. Fill a syringe with about 30 ml of fluid, push out every bubble and connect "
                "it to the caliper bleed port. Open the port a quarter turn.",
            ),
            (
                "p",
                "4. Push fluid slowly from the caliper up to the lever until no more bubbles "
                "appear in the bag, flicking the hose and tapping the caliper with a plastic "
                "tool as you go.",
            ),
            (
                "p",
                "5. Close the caliper bleed port while keeping a light pressure on the syringe, "
                "and tighten it to 2 Nm. Remove the syringe.",
            ),
            (
                "p",
                "6. Squeeze the lever a few times with the bag still fitted; any last bubbles "
                "rise into the bag. Remove the bag, top the reservoir up to the brim and refit "
                "the bleed screw.",
            ),
            (
                "p",
                "7. Clean all fluid from the lever, caliper and frame with alcohol. Refit the "
                "pads, clean the rotor and bed in the pads.",
            ),
            ("p", "Waste fluid goes into the labelled waste bottle, never into a drain."),
        ],
        [
            ("h2", "Hose shortening"),
            (
                "p",
                "Hoses are fitted long on new builds and shortened to suit the frame and bar. "
                "Cut the hose square with the hose cutter; a knife leaves an angled end that "
                "will not seal. Push a new brass insert MCW-HB2-INS-05 into the cut end and "
                "slide a new olive MCW-HB2-OLV-05 over it. Old olives and inserts are never "
                "reused. Tighten the hose nut at the lever to 5 Nm and bleed the brake.",
            ),
            ("h2", "Caliper alignment"),
            (
                "p",
                "Loosen both caliper mounting bolts until the caliper can just move. Squeeze the "
                "lever firmly and hold it: the pistons centre the caliper on the rotor. While "
                "holding the lever, tighten the bolts a little at a time, alternating between "
                "them. Release the lever and spin the wheel. If a pad still touches, move the "
                "caliper by eye until there is an equal gap on both sides, using a white card "
                "behind the rotor to see the gap.",
            ),
            ("h3", "Caliper mounting bolts"),
            (
                "p",
                "Since ECN-0141 took effect on 2025-06-09, the caliper is fixed with pre-coated "
                "M6 x 18 bolts, part MCW-BLT-M6-18TL, tightened to 8 Nm. Revision C of this "
                "manual gave 6 Nm with liquid threadlock; that value no longer applies. "
                "Pre-coated bolts may be used once only. When you remove a caliper for any "
                "reason, fit new bolts.",
            ),
            ("h2", "Torque values for the HB2"),
            (
                "table",
                (90, 40, 40),
                [
                    ("Fastener", "Torque", "Notes"),
                    ("Caliper mounting bolts, pre-coated", "8 Nm", "ECN-0141"),
                    ("Caliper bleed port screw", "2 Nm", "Do not overtighten"),
                    ("Hose nut at lever and caliper", "5 Nm", "New olive and insert"),
                    ("Lever clamp bolt", "3 Nm", ""),
                    ("Rotor bolts, T25", "4 Nm", "Cross pattern"),
                    ("Pad retaining pin", "hand tight", "Clip must engage"),
                ],
            ),
        ],
        [
            ("h2", "Fault finding"),
            (
                "p",
                "Work through the table from left to right. If the fix does not cure the fault, "
                "go back and check the cause again before you replace parts.",
            ),
            (
                "table",
                (52, 58, 60),
                [
                    ("Symptom", "Likely cause", "What to do"),
                    (
                        "Lever comes back to the bar, bite point moves",
                        "Air in the system",
                        "Bleed the brake; look for a leak if it returns",
                    ),
                    (
                        "Lever firm but brake weak",
                        "Contaminated or glazed pads",
                        "Replace pads, clean rotor, bed in",
                    ),
                    ("Squeal after new pads", "Pads not bedded in", "Bed in; check rotor for oil"),
                    (
                        "Rubbing noise on every turn",
                        "Caliper not centred or rotor bent",
                        "Realign caliper; true rotor with the rotor fork",
                    ),
                    (
                        "Brake drags after wheel refit",
                        "Wheel not seated in dropouts",
                        "Refit wheel, then recheck alignment",
                    ),
                    (
                        "Fluid weeping at hose nut",
                        "Reused olive or angled cut",
                        "Recut hose, new olive and insert, bleed",
                    ),
                    ("Lever blade wobbles sideways", "Pivot pin moving", "Rework per SN-2025-03"),
                    (
                        "Pistons will not retract",
                        "Dirt on piston walls",
                        "Clean pistons with alcohol, exercise with piston press",
                    ),
                    (
                        "Bite point changes when hot",
                        "Old fluid has absorbed water or overheated",
                        "Full fluid change; fit sintered pads for heavy riders",
                    ),
                ],
            ),
            ("h2", "When to replace instead of repair"),
            (
                "p",
                "The HB2 caliper and lever are not rebuilt in the workshop. If a piston is "
                "seized, a seal leaks, or a caliper has been dropped and cracked, replace the "
                "caliper. If the lever leaks from the master piston or the reservoir cover, "
                "replace the lever. Send the faulty part to quality engineering with the job "
                "card number if the bike is under warranty.",
            ),
            ("h2", "Revision history"),
            (
                "p",
                "Revision A, 2023-02: first issue. Revision B, 2023-11: sintered pads added for "
                "the Halden E. Revision C, 2024-09: hose shortening section rewritten. Revision "
                "D, 2025-07: caliper bolt torque changed to 8 Nm under ECN-0141; lever lot check "
                "added for SN-2025-03.",
            ),
        ],
    ],
}

_HALDEN_MANUAL = {
    "title": "Halden E Drive System Service Manual",
    "code": "SM-HE revision B, 2025-12-01",
    "pages": [
        [
            ("h1", "Halden E Drive System - Service Manual"),
            (
                "p",
                "Revision B, issued 2025-12-01. Covers Halden E bikes with the C3 drive "
                "controller, frame serial numbers HE-240001 and above. Bikes with lower serial "
                "numbers use the C2 controller and are covered by the earlier manual, SM-HE "
                "revision A. Owner: Teodor Vaskel.",
            ),
            ("h2", "System overview"),
            (
                "p",
                "The Halden E is a pedal-assist city and touring e-bike. A torque sensor in the "
                "bottom bracket measures how hard the rider pushes on the pedals; the C3 "
                "controller in the down tube reads this signal together with wheel speed and "
                "tells the rear hub motor how much help to give. Assist stops at 25 km/h. The "
                "battery slides into the down tube from below and locks with a key. The display "
                "on the handlebar talks to the controller over a two-wire data line that runs "
                "inside the head tube.",
            ),
            ("h2", "Components"),
            (
                "table",
                (50, 70, 50),
                [
                    ("Part number", "Component", "Notes"),
                    ("MCW-HE-CTL-C3", "C3 drive controller", "Firmware 2.4 since ECN-0163"),
                    ("MCW-HE-MTR-250", "Rear hub motor, 250 W", "Supplied by Corran Motion"),
                    (
                        "MCW-HE-TQS-01",
                        "Torque sensor bottom bracket",
                        "Three-pin connector, green collar",
                    ),
                    ("MCW-HE-DSP-02", "Handlebar display and control pad", "Removable"),
                    ("HE-PACK-504", "Battery, 36 V, 14 Ah, 504 Wh", "Standard"),
                    ("HE-PACK-630", "Battery, 36 V, 17.5 Ah, 630 Wh", "Option, same mount"),
                    ("MCW-HE-CHG-4A", "Charger, 4 A", "Full charge in about 4.5 hours"),
                    ("MCW-HE-MAG-01", "Speed sensor magnet", "Clips to rear rotor"),
                ],
            ),
            ("h2", "Safety before you start"),
            (
                "p",
                "Remove the battery before any work on the wiring, the motor or the controller, "
                "and before you remove the rear wheel. Keep the battery on the charging shelf in "
                "bay 5 while you work, not on the floor by the stand. Never test a motor by "
                "running it with the bike off the ground at full assist; use the motor test in "
                "the service tool, which limits the current.",
            ),
        ],
        [
            ("h2", "Diagnostic access"),
            (
                "p",
                "All diagnosis starts with the service tool on the workshop laptop and the "
                "service dongle MCW-TK-DGL-01. The dongle plugs into the diagnostic port under "
                "the small cover on the top tube, just behind the head tube. The bike must be "
                "switched on, with a battery fitted that is at least 20 percent charged.",
            ),
            ("h3", "Reading the fault log"),
            (
                "p",
                "The controller keeps the last 200 fault events. Each entry holds the code, the "
                "odometer reading, the battery voltage and the assist level at the moment of the "
                "fault. Always save the log to the job card before you clear it or change any "
                "setting. A single event in thousands of kilometres is rarely worth chasing; the "
                "same code every ride is a real fault.",
            ),
            ("h3", "System test"),
            (
                "p",
                "The system test checks the battery, the torque sensor, the speed sensor, the "
                "motor hall sensors and the display link one by one, and prints a pass or fail "
                "for each. It takes about two minutes. The torque sensor step asks you to stand "
                "on the right pedal with the rear brake held; the reading must rise smoothly and "
                "fall back to zero when you step off.",
            ),
            ("h3", "Settings a mechanic may change"),
            (
                "p",
                "The service tool can change the wheel circumference, the display units and the "
                "assist levels within the limits set by the controller. The wheel circumference "
                "must match the fitted tyre, or the speed shown and the assist cut-off will be "
                "wrong: 2150 mm for the standard 50 mm tyre. The 25 km/h assist limit cannot be "
                "raised and must never be bypassed. A bike fitted with a device that alters the "
                "speed signal loses its motor and controller warranty and must not be ridden on "
                "the road until the device is removed.",
            ),
            ("h3", "Updating firmware"),
            (
                "p",
                "Firmware updates are released by engineering change notice and loaded from the "
                "dongle. Read the notice before you update: some packages only suit certain "
                "serial ranges. Never update a bike whose battery is below 30 percent.",
            ),
        ],
        [
            ("h2", "Fault codes"),
            (
                "p",
                "The display shows a code when the controller detects a fault. The table gives "
                "the workshop checks for each code, in the order they should be done. The "
                "customer help pages describe the same codes in plain words for riders.",
            ),
            (
                "table",
                (18, 42, 110),
                [
                    ("Code", "Meaning", "Workshop checks"),
                    (
                        "E-05",
                        "No speed signal",
                        "Magnet MCW-HE-MAG-01 aligned with sensor, gap 2 to 4 mm; sensor cable at "
                        "the "
                        "left chainstay; replace sensor if the system test still fails.",
                    ),
                    (
                        "E-11",
                        "Battery voltage below cut-off",
                        "Cut-off is 30.0 V under load. Measure at rest: a charged pack reads over "
                        "40 V. "
                        "If a charged pack shows E-11 on a climb, run the capacity test on page 4.",
                    ),
                    (
                        "E-17",
                        "Torque sensor signal lost",
                        "Read the log count. Connector with green collar under the motor cover "
                        "fully "
                        "clicked home; cable chafe at the chainstay clip, fit boot MCW-HE-BOOT-02 "
                        "if "
                        "missing; sensor resistance 4.7 kilohm between pins 2 and 3. Firmware 2.4 "
                        "filters "
                        "short drop-outs (ECN-0163).",
                    ),
                    (
                        "E-23",
                        "Motor phase or hall sensor fault",
                        "Motor cable quick connector at the right chainstay; phase-to-phase "
                        "resistance "
                        "0.2 to 0.4 ohm, all three equal; hall test in the service tool. Do not "
                        "keep "
                        "resetting an E-23.",
                    ),
                    (
                        "E-31",
                        "Controller over-temperature",
                        "Power is reduced from 75 C and cut at 85 C. Usually a heavy load on a "
                        "long climb "
                        "in high assist. Check the controller heat pad is in place if it recurs "
                        "on short "
                        "rides.",
                    ),
                    (
                        "E-42",
                        "Display to controller communication lost",
                        "Clean display mount contacts; check the harness where it enters the head "
                        "tube; "
                        "data line resistance 60 ohm with the battery removed; swap display to "
                        "test.",
                    ),
                ],
            ),
            ("h3", "Codes that clear themselves"),
            (
                "p",
                "E-11 clears when the battery is charged and E-31 clears when the controller has "
                "cooled below 70 C. All other codes stay on the display until the bike is "
                "switched off and on, but remain in the fault log. A code that returns within "
                "one ride after a restart must be investigated before the bike is returned to "
                "the customer.",
            ),
        ],
        [
            ("h2", "Battery care and testing"),
            ("h3", "Charging"),
            (
                "p",
                "Use only the MCW-HE-CHG-4A charger. It charges an HE-PACK-504 from empty to "
                "full in about 4.5 hours and an HE-PACK-630 in about 5.5 hours. The charger "
                "light is red while charging and green when the pack is full. A charger that is "
                "warm is normal; a charger that is too hot to hold is faulty and must be taken "
                "out of use.",
            ),
            ("h3", "Capacity test"),
            (
                "p",
                "When a customer reports poor range, run the capacity test before replacing "
                "anything. Charge the pack fully, connect it to the load tester through the "
                "service tool and start the test. The tester discharges the pack at a fixed rate "
                "and reports the usable capacity in watt hours. The test takes about six hours, "
                "so book the bike in overnight and leave the pack on the tester in the fire-safe "
                "cabinet, not on the open shelf. Charge the pack to 50 percent afterwards.",
            ),
            ("h3", "Reading the result"),
            (
                "p",
                "A pack that gives 70 percent or more of its rated capacity is healthy. Poor "
                "range from a healthy pack usually comes from low tyre pressure, heavy use of "
                "Turbo or cold weather. A pack under 70 percent within two years and within 500 "
                "full charge cycles is a warranty claim; the service tool shows the cycle count "
                "on the battery screen. Record the result in watt hours on the job card.",
            ),
            ("h3", "Storage advice for customers"),
            (
                "p",
                "Tell customers who put the bike away for winter to store the battery indoors at "
                "about half charge and to top it up to half every two months. A pack left empty "
                "for months can fall below the voltage at which it can be recharged, and that is "
                "not covered by warranty.",
            ),
        ],
        [
            ("h2", "Rear wheel and hub motor"),
            ("h3", "Removing the rear wheel"),
            (
                "p",
                "Remove the battery. Unplug the motor cable at the quick connector by the right "
                "chainstay: press the tab and pull the two halves straight apart, never by the "
                "cable. Shift to the smallest sprocket, undo the axle nuts and lift the wheel "
                "out, keeping note of which way the torque washers face.",
            ),
            ("h3", "Refitting the rear wheel"),
            (
                "p",
                "Each torque washer has a tab that must sit inside the dropout slot, facing "
                "down. A torque washer fitted the wrong way round lets the axle turn under "
                "power, which tears the motor cable out of the axle. Tighten both axle nuts to "
                "40 Nm. Reconnect the motor cable until it clicks, and route it through the clip "
                "so that it cannot touch the rotor.",
            ),
            ("h3", "Speed sensor magnet"),
            (
                "p",
                "After refitting, check that the speed sensor magnet on the rotor passes the "
                "sensor with a gap of 2 to 4 mm. If the gap is wrong the bike may show E-05 or "
                "give jerky assist.",
            ),
            ("h3", "Hub motor service"),
            (
                "p",
                "The hub motor is sealed and is not opened in the workshop. A motor that is "
                "noisy, has play at the axle or fails the hall test is exchanged through Corran "
                "Motion. Pack the motor in the exchange box with the axle nuts and washers "
                "removed and the cable taped to the side.",
            ),
            ("h2", "After any repair"),
            (
                "p",
                "Run the system test, clear the fault log, ride one lap of the yard in each "
                "assist level and check walk assist. Write the firmware version and the system "
                "test result on the job card.",
            ),
        ],
    ],
}

_TERN_MANUAL = {
    "title": "Tern 700 Frame Technical Manual",
    "code": "TM-T700 issue 5, 2025-03-01",
    "pages": [
        [
            ("h1", "Tern 700 Frame - Technical Manual"),
            (
                "p",
                "Issue 5, 2025-03-01. For mechanics building, fitting and inspecting the Tern "
                "700 steel touring frame and fork. Owner: Dario Kessing, production "
                "engineering.",
            ),
            ("h2", "The frame"),
            (
                "p",
                "The Tern 700 frame is TIG-welded from double-butted chromoly steel tubes, "
                "supplied as tube sets by Tolland Tube Works and welded in our own shop. The "
                "fork has straight steel blades with mounts for low-rider racks. The frame is "
                "finished in powder coat over a zinc-rich primer, and the inside of every tube "
                "is sprayed with a corrosion-resistant wax before assembly. Frames are built in "
                "five sizes and can take 700C wheels with tyres up to 50 mm.",
            ),
            ("h2", "Geometry"),
            (
                "table",
                (30, 28, 28, 28, 28, 28),
                [
                    ("Size", "50", "53", "56", "59", "62"),
                    ("Seat tube, mm", "500", "530", "560", "590", "620"),
                    ("Top tube, mm", "535", "550", "565", "582", "600"),
                    ("Head angle", "70.5", "71.0", "71.5", "72.0", "72.0"),
                    ("Seat angle", "74.0", "73.5", "73.0", "73.0", "72.5"),
                    ("Stack, mm", "560", "585", "610", "635", "660"),
                    ("Reach, mm", "372", "380", "387", "395", "402"),
                    ("Head tube, mm", "120", "145", "170", "195", "220"),
                ],
            ),
            (
                "p",
                "All sizes share a chainstay length of 455 mm, a bottom bracket drop of 75 mm "
                "and a fork offset of 50 mm. The long chainstays keep the rider's heels clear of "
                "rear panniers.",
            ),
        ],
        [
            ("h2", "Loads and mounting points"),
            ("h3", "Maximum loads"),
            (
                "p",
                "The maximum system weight - rider, bike and all luggage together - is 150 kg. "
                "Within that limit the rear rack may carry up to 30 kg and the front low-rider "
                "rack up to 15 kg, split evenly between the two sides. A trailer may be used "
                "with a hitch on the rear axle; the trailer's weight counts toward the 150 kg "
                "limit only for the part resting on the hitch.",
            ),
            ("h3", "Mounting points"),
            (
                "li",
                "Rear rack: two eyelets at each rear dropout and two threaded bosses on the "
                "seat stays.",
            ),
            (
                "li",
                "Front low-rider: a threaded boss halfway up each fork blade and an eyelet at "
                "each fork end.",
            ),
            ("li", "Three-bolt cargo mounts on the outside of each fork blade."),
            ("li", "Three bottle mounts: seat tube, down tube top and under the down tube."),
            (
                "li",
                "Mudguard eyelets at the fork ends, rear dropouts, chainstay bridge and seat "
                "stay bridge.",
            ),
            ("li", "A kickstand plate behind the bottom bracket, for a two-bolt kickstand only."),
            (
                "p",
                "All mounting threads are M5. Grease every thread on assembly, even those not in "
                "use, and fit a bolt in every unused eyelet so that road dirt does not fill the "
                "thread.",
            ),
            ("h3", "Tyre clearance"),
            (
                "p",
                "Without mudguards the frame takes tyres up to 50 mm wide. With the standard "
                "mudguards the limit is 45 mm, leaving the minimum 6 mm gap between tyre and "
                "mudguard all round. The standard build uses 38 mm tyres.",
            ),
        ],
        [
            ("h2", "Fitting components"),
            (
                "table",
                (70, 100),
                [
                    ("Interface", "Specification"),
                    ("Bottom bracket shell", "68 mm wide, English thread; chase before fitting"),
                    ("Head tube", "Cups for 41.8 mm cartridge bearings, 45 x 45 degree"),
                    ("Steerer", "28.6 mm steel, cut to length at build"),
                    ("Seat post", "27.2 mm; minimum insertion 80 mm"),
                    ("Seat clamp", "External, 30.0 mm; 6 Nm"),
                    ("Rear axle", "12 mm thru-axle, 142 mm spacing"),
                    ("Front axle", "12 mm thru-axle, 100 mm spacing"),
                    ("Disc brake mounts", "Post mount, 160 mm rotor rear; 160 or 180 mm front"),
                    ("Rim brake version", "Cantilever bosses; 135 mm quick-release rear"),
                    ("Front derailleur", "Clamp-on, 28.6 mm"),
                ],
            ),
            ("h3", "Headset"),
            (
                "p",
                "Since ECN-0129 the Tern 700 uses the sealed cartridge headset kit "
                "MCW-HS-T7-42SC. Grease the cups lightly before fitting. The spacer stack "
                "between the head tube and the stem must not exceed 30 mm; more than that puts "
                "too much leverage on the steerer. Cut the steerer so that it finishes 3 mm "
                "below the top of the stem.",
            ),
            ("h3", "Seat post"),
            (
                "p",
                "Always grease the inside of the seat tube before fitting the post. A steel "
                "frame ridden in the rain will otherwise seize an aluminium post within one "
                "winter. The post must go at least 80 mm into the frame, which is further than "
                "the minimum mark on some aftermarket posts. If a customer's post is too short "
                "to reach 80 mm at their saddle height, fit a longer post.",
            ),
            ("h3", "Rotor size"),
            (
                "p",
                "Fit a 180 mm front rotor on size 59 and 62 frames and on any bike that will be "
                "toured with a full load. The rear is always 160 mm, because the frame's rear "
                "mount is not designed for a larger rotor.",
            ),
        ],
        [
            ("h2", "Inspection and care"),
            ("h3", "Where cracks start"),
            (
                "p",
                "Steel frames rarely fail suddenly, but a crack can grow over thousands of "
                "kilometres under load. At every service, clean and look closely at these places "
                "with a torch: the welds at the bottom of the head tube, the chainstay bridge, "
                "the seat stay to seat tube junction and the inside faces of both rear dropouts. "
                "A crack often shows first as a thin line of rust bleeding through the paint. "
                "Any suspected crack means the bike is not returned to the customer until "
                "quality engineering has seen it.",
            ),
            ("h3", "After a crash"),
            (
                "p",
                "A frame that has been in a crash must be checked for alignment before it is "
                "ridden again. Put the frame on the alignment table and check that the rear "
                "dropouts are parallel and centred: the tolerance is 0.5 mm. Check the fork for "
                "bent blades by comparing the two sides against the straight edge. Steel can be "
                "cold-set back into line by a trained mechanic if the error is small and there "
                "is no crease or ripple in any tube; a crease means the frame or fork must be "
                "replaced.",
            ),
            ("h3", "Rust protection"),
            (
                "p",
                "Re-wax the inside of the tubes every two years, or after a winter of salty "
                "roads. Remove the seat post and the bottom bracket, spray the wax into every "
                "tube through the bottom bracket shell and the seat tube, and leave the frame "
                "upside down for an hour to let the excess drain. Touch up chips in the paint "
                "with the matching touch-up pen as soon as they appear.",
            ),
            ("h3", "Warranty"),
            (
                "p",
                "The Tern 700 frame and fork carry a lifetime warranty for the original owner "
                "against defects in materials and welding. The full terms, including what "
                "happens when the bike changes hands, are in the warranty terms document.",
            ),
        ],
    ],
}

_WHEEL_GUIDE = {
    "title": "Wheel Building and Truing Guide",
    "code": "WG-01 issue 3, 2025-05-12",
    "pages": [
        [
            ("h1", "Wheel Building and Truing Guide"),
            (
                "p",
                "Issue 3, 2025-05-12, by Fenn Ashgrove. This guide gives the reference data and "
                "the methods used for building new wheels in the Marrowby workshop. Truing of "
                "wheels in for service is covered by the separate truing procedure WP-09, which "
                "sets the tolerances.",
            ),
            ("h2", "Rims"),
            (
                "table",
                (42, 28, 30, 70),
                [
                    ("Rim", "Holes", "ERD, mm", "Used on"),
                    ("Quay 700C", "32", "602", "Tern 700, Cobble; tube only"),
                    ("Quay 700C", "36", "602", "Tern 700 heavy touring option"),
                    ("Loam 27", "28 or 32", "584", "Cobble trail, Halden E option; tubeless"),
                    ("Halden E rear", "36", "594", "Halden E motor wheel"),
                    ("Brisk 24", "28", "498", "Brisk 24; rim brake"),
                ],
            ),
            (
                "p",
                "Quay and Loam rims are made for us by Quillmoor Alloys. ERD is the effective "
                "rim diameter used in the spoke length calculation. Measure a new batch of rims "
                "with the ERD gauge before building; a batch that differs from the table by more "
                "than 1 mm must be reported to Fenn Ashgrove before any wheels are built with "
                "it.",
            ),
            ("h2", "Hubs"),
            (
                "p",
                "Standard wheels use the MCW-HUB-F100 front hub and the MCW-HUB-R142 rear hub, "
                "both with sealed cartridge bearings from Brindle Bearings. The Halden E rear "
                "wheel is built around the hub motor, which has much larger flanges than a "
                "normal hub. Its flange diameter and offset are on the motor data sheet kept "
                "with the spoke calculator.",
            ),
        ],
        [
            ("h2", "Spokes and lacing"),
            ("h3", "Spoke choice"),
            (
                "p",
                "Use 2.0/1.8/2.0 mm double-butted stainless spokes with 14 mm brass nipples for "
                "all standard wheels. The Halden E motor wheel uses 2.3 mm plain-gauge spokes "
                "with 12 mm nipples, because the motor puts high torque through the spokes when "
                "it pulls away. The Brisk 24 uses 2.0 mm plain-gauge spokes.",
            ),
            ("h3", "Lacing patterns"),
            (
                "p",
                "Lace 32 and 36 hole standard wheels three-cross on both sides. Lace 28 hole "
                "wheels two-cross. Lace the Halden E motor wheel one-cross, because the large "
                "motor flange would make longer crossings hit the flange edge. Radial lacing is "
                "never used at Marrowby, even on front wheels, because most of our front wheels "
                "carry a disc brake and the rest may one day carry a hub dynamo.",
            ),
            ("h3", "Spoke length"),
            (
                "p",
                "Calculate spoke lengths with the workshop spoke calculator from the rim ERD, "
                "the hub flange diameters and offsets, the number of holes and the crossing "
                "pattern. Round to the nearest even millimetre downward. Write the calculated "
                "lengths on the build card before cutting or picking spokes, so that the "
                "calculation can be checked if the wheel goes wrong.",
            ),
            ("h3", "Building order"),
            (
                "p",
                "Lace the wheel loosely, with every nipple turned down to the same thread depth. "
                "Bring the tension up evenly, a whole turn per nipple at first and then half "
                "turns, and true as you go. Stop half way to full tension and stress relieve the "
                "spokes before going on.",
            ),
        ],
        [
            ("h2", "Spoke tension"),
            (
                "p",
                "Tension is measured with the workshop tension meter. The meter gives a reading "
                "on its scale, which the chart converts to newtons. The chart depends on the "
                "spoke gauge; the table below is for 2.0/1.8 mm double-butted spokes measured on "
                "the thin middle section.",
            ),
            (
                "table",
                (50, 60),
                [
                    ("Meter reading", "Tension, N"),
                    ("16", "670"),
                    ("18", "800"),
                    ("20", "950"),
                    ("22", "1100"),
                    ("24", "1280"),
                    ("25", "1370"),
                ],
            ),
            ("h3", "Target tensions"),
            (
                "table",
                (80, 45, 45),
                [
                    ("Wheel", "Target, N", "Maximum, N"),
                    ("Quay 700C front", "1000", "1200"),
                    ("Quay 700C rear, drive side", "1100", "1300"),
                    ("Loam 27 front", "1050", "1250"),
                    ("Loam 27 rear, drive side", "1150", "1300"),
                    ("Halden E motor wheel", "1200", "1350"),
                    ("Brisk 24 front and rear", "900", "1100"),
                ],
            ),
            (
                "p",
                "On a dished rear wheel the non-drive side spokes end up lower than the drive "
                "side, usually at 55 to 65 percent of the drive side tension. That is normal; "
                "set the drive side to the target and let the dish decide the other side. Every "
                "spoke on one side of a wheel should be within 10 percent of the average for "
                "that side.",
            ),
        ],
        [
            ("h2", "Finishing a wheel"),
            ("h3", "Stress relieving"),
            (
                "p",
                "Stress relieve at half tension and again at full tension. Grasp parallel pairs "
                "of spokes on the same side and squeeze them firmly all the way round the wheel, "
                "then lay the wheel on the floor on a cloth and press down gently on the rim at "
                "four points. Retrue after each round. A wheel that still pings after the second "
                "round has spokes that are winding up; back each nipple off a fraction and "
                "retrue.",
            ),
            ("h3", "Final checks"),
            (
                "p",
                "Check lateral and radial true against the new build tolerances in WP-09, check "
                "the dish with the dishing gauge from both sides and check the tension of every "
                "spoke. Record the tension readings of the drive side on the build card with the "
                "builder's initials and the date. A new wheel is checked again by a second wheel "
                "builder before it is fitted to a bike.",
            ),
            ("h3", "Rim wear"),
            (
                "p",
                "Quay and Loam rims are used only with disc brakes and do not wear from braking. "
                "The Brisk 24 rim is a rim-brake rim and has a wear groove machined into each "
                "braking surface. When the groove is no longer visible at any point, the rim "
                "must be replaced; a worn rim can split under tyre pressure. Rims with a crack "
                "at any spoke hole are always replaced, whatever their age, and the spoke "
                "tension at that hole is recorded for quality engineering.",
            ),
            ("h3", "Rim tape"),
            (
                "p",
                "Quay rims take 21 mm rim tape, part MCW-RT-21, since ECN-0152. Loam rims take "
                "tubeless tape MCW-TT-25 even when they are run with tubes. Never use cloth tape "
                "on a Loam rim.",
            ),
        ],
    ],
}

_CATALOGUE = {
    "title": "Parts Catalogue 2026",
    "code": "PC-2026 edition 1, 2025-12-15",
    "pages": [
        [
            ("h1", "Marrowby Cycle Works - Parts Catalogue 2026"),
            (
                "p",
                "Edition 1, 2025-12-15. Spare parts for Marrowby bikes, for dealers and for the "
                "parts desk at Tanner's Yard. Prices are dealer list prices before tier discount "
                "and before tax. Parts marked W are for workshop use and are not sold to "
                "riders.",
            ),
            ("h2", "Reading a part number"),
            (
                "p",
                "Every Marrowby part number has the form MCW-group-item-variant. The group tells "
                "you what kind of part it is; the item and variant identify the exact part. For "
                "example MCW-HB2-CAL-07 is in the HB2 brake group, item caliper, design 07. "
                "Battery packs and a few bought-in parts keep the supplier's own code, such as "
                "HE-PACK-504.",
            ),
            (
                "table",
                (30, 70, 70),
                [
                    ("Group", "Covers", "Catalogue page"),
                    ("HB1, HB2, ROT", "Brakes and rotors", "2"),
                    ("RIM, RT, TT, TV, HUB, SPK", "Wheels, tapes, valves, hubs, spokes", "3"),
                    ("CRB, HS, DH, B24, SPC", "Drivetrain, headsets, hangers, small parts", "4"),
                    ("HE", "Halden E electrical parts", "5"),
                    ("TK", "Workshop tools (W)", "2 and 5"),
                    ("FLD, SEAL", "Fluids and sealant", "2 and 3"),
                ],
            ),
            ("h2", "Ordering"),
            (
                "p",
                "Dealers order through the trade portal; orders placed before 13:00 leave the "
                "same day. The parts desk can check stock for any part in this catalogue. "
                "Superseded parts are listed with the number that replaces them and the change "
                "notice that made the change. Order the replacement part; superseded numbers are "
                "supplied only until stock runs out.",
            ),
            ("h2", "Returning parts"),
            (
                "p",
                "Unused parts in their sealed bag can be returned within 30 days for credit. "
                "Electrical parts that have been connected to a bike, fluids and cut hoses "
                "cannot be returned unless faulty.",
            ),
        ],
        [
            ("h2", "Brakes"),
            (
                "table",
                (50, 80, 18, 22),
                [
                    ("Part number", "Description", "Price", "Status"),
                    ("MCW-HB2-LEV-03", "HB2 lever assembly, left or right", "38.00", "Current"),
                    ("MCW-HB2-CAL-07", "HB2 caliper, two-piston", "44.00", "Current"),
                    ("MCW-HB2-HOSE-1200", "HB2 front hose, 1200 mm", "9.50", "Current"),
                    ("MCW-HB2-HOSE-1800", "HB2 rear hose, 1800 mm", "12.50", "Current"),
                    ("MCW-HB2-OLV-05", "Olive, pack of 10", "4.00", "Current"),
                    ("MCW-HB2-INS-05", "Hose insert, pack of 10", "4.00", "Current"),
                    ("MCW-HB2-PAD-R", "Pads, resin, pair", "11.00", "Current"),
                    ("MCW-HB2-PAD-S", "Pads, sintered, pair", "13.50", "Current"),
                    (
                        "MCW-HB2-PIN-02",
                        "Lever pivot pin, press fit",
                        "-",
                        "Superseded by PIN-04, SN-2025-03",
                    ),
                    ("MCW-HB2-PIN-04", "Lever pivot pin, grooved", "2.20", "Current"),
                    ("MCW-HB2-CLP-04", "Circlip for PIN-04, pack of 10", "1.80", "Current"),
                    (
                        "MCW-BLT-M6-18TL",
                        "Caliper bolt M6 x 18, pre-coated, pack of 4",
                        "3.60",
                        "Current, ECN-0141",
                    ),
                    (
                        "MCW-BLT-M6-18",
                        "Caliper bolt M6 x 18, plain",
                        "-",
                        "Superseded by M6-18TL, ECN-0141",
                    ),
                    ("MCW-HB1-CAL-02", "HB1 mechanical caliper", "29.00", "Current"),
                    ("MCW-HB1-PAD-R", "HB1 pads, resin, pair", "9.00", "Current"),
                    ("MCW-ROT-160", "Rotor 160 mm, six-bolt", "18.00", "Current"),
                    ("MCW-ROT-180", "Rotor 180 mm, six-bolt", "21.00", "Current"),
                    ("MCW-B24-VBP-01", "Brisk 24 rim brake pads, pair", "6.50", "Current"),
                    ("MCW-FLD-M5-100", "Hydro Fluid M5, 100 ml", "7.00", "Current"),
                    ("MCW-TK-BLD-02", "HB2 bleed kit (W)", "48.00", "Current"),
                    ("MCW-TK-BLK-01", "Bleed block, yellow, 5 mm (W)", "3.00", "Current"),
                ],
            ),
            (
                "p",
                "HB1 and HB2 pads are not interchangeable. HB1 parts are for the standard Cobble "
                "only.",
            ),
        ],
        [
            ("h2", "Wheels, tyres and tapes"),
            (
                "table",
                (50, 80, 18, 22),
                [
                    ("Part number", "Description", "Price", "Status"),
                    ("MCW-RIM-Q700-32H", "Quay 700C rim, 32 hole", "42.00", "Current"),
                    ("MCW-RIM-Q700-36H", "Quay 700C rim, 36 hole", "44.00", "Current"),
                    ("MCW-RIM-L27-28H", "Loam 27 rim, 28 hole, tubeless", "49.00", "Current"),
                    ("MCW-RIM-L27-32H", "Loam 27 rim, 32 hole, tubeless", "49.00", "Current"),
                    ("MCW-RIM-B24-28H", "Brisk 24 rim, 28 hole", "24.00", "Current"),
                    ("MCW-RT-18", "Rim tape, 18 mm, Quay", "-", "Superseded by RT-21, ECN-0152"),
                    ("MCW-RT-21", "Rim tape, 21 mm, Quay, pair", "5.00", "Current"),
                    ("MCW-TT-25", "Tubeless tape, 25 mm, 10 m roll", "12.00", "Current"),
                    ("MCW-TV-44", "Tubeless valve, 44 mm, pair", "9.00", "Current"),
                    ("MCW-SEAL-1L", "Tyre sealant, 1 litre (W)", "19.00", "Current"),
                    ("MCW-HUB-F100", "Front hub, 100 mm, 12 mm axle", "55.00", "Current"),
                    ("MCW-HUB-R142", "Rear hub, 142 mm, 12 mm axle", "82.00", "Current"),
                    (
                        "MCW-SPK-DB-xxx",
                        "Spoke, 2.0/1.8 DB, length xxx mm, box of 50",
                        "28.00",
                        "Current",
                    ),
                    ("MCW-SPK-23-xxx", "Spoke, 2.3 mm motor wheel, box of 36", "26.00", "Current"),
                    ("MCW-TYR-38-700", "Tyre, 700 x 38, touring, reflective", "31.00", "Current"),
                    ("MCW-TYR-40-700", "Tyre, 700 x 40, puncture resistant", "29.00", "Current"),
                    ("MCW-TYR-50-HE", "Tyre, 50 mm, e-bike rated", "36.00", "Current"),
                ],
            ),
            (
                "p",
                "Custom wheel builds are quoted separately by the wheel builders. Spoke lengths "
                "are stocked in even millimetres only.",
            ),
        ],
        [
            ("h2", "Drivetrain, headsets and frame parts"),
            (
                "table",
                (50, 80, 18, 22),
                [
                    ("Part number", "Description", "Price", "Status"),
                    (
                        "MCW-CRB-AL-8.5",
                        "Chainring bolts, aluminium, set of 4",
                        "8.00",
                        "Tern 700 only, ECN-0158",
                    ),
                    (
                        "MCW-CRB-ST-8.5",
                        "Chainring bolts, steel, black, set of 4",
                        "6.00",
                        "Current, Cobble",
                    ),
                    ("MCW-HS-T7-LB", "Tern 700 headset, loose ball", "-", "Withdrawn, ECN-0129"),
                    (
                        "MCW-HS-T7-42SC",
                        "Tern 700 headset, sealed cartridge kit",
                        "34.00",
                        "Current",
                    ),
                    ("MCW-HS-CB-01", "Cobble headset, integrated", "27.00", "Current"),
                    ("MCW-DH-T7-01", "Derailleur hanger, Tern 700", "14.00", "Current"),
                    ("MCW-DH-CB-02", "Derailleur hanger, Cobble", "12.00", "Current"),
                    ("MCW-DH-HE-03", "Derailleur hanger, Halden E", "14.00", "Current"),
                    (
                        "MCW-B24-STB-16",
                        "Brisk 24 stem bolt, 16 mm, set of 4",
                        "2.50",
                        "Current, SN-2025-07",
                    ),
                    ("MCW-SPC-T7-30", "Stem spacer set, 30 mm total, Tern 700", "6.00", "Current"),
                    ("MCW-SCL-30", "Seat clamp, 30.0 mm", "11.00", "Current"),
                    ("MCW-RCK-T7-R", "Tern 700 rear rack, 30 kg", "79.00", "Current"),
                    ("MCW-RCK-T7-F", "Tern 700 low-rider rack, 15 kg", "69.00", "Current"),
                    ("MCW-KS-02", "Kickstand, two-bolt", "24.00", "Current"),
                    ("MCW-TU-T7", "Touch-up pen, Tern 700 colours", "7.50", "Current"),
                ],
            ),
            (
                "p",
                "When ordering a derailleur hanger, check the model carefully: the three hangers "
                "look alike but have different bolt positions. A wrong hanger will bend the "
                "first time the gears are indexed.",
            ),
        ],
        [
            ("h2", "Halden E electrical parts"),
            (
                "table",
                (50, 80, 18, 22),
                [
                    ("Part number", "Description", "Price", "Status"),
                    ("MCW-HE-CTL-C3", "C3 drive controller, firmware 2.4", "210.00", "Current"),
                    ("MCW-HE-CTL-C2", "C2 drive controller", "-", "Exchange only"),
                    ("MCW-HE-DSP-02", "Display and control pad", "96.00", "Current"),
                    ("MCW-HE-TQS-01", "Torque sensor bottom bracket", "145.00", "Current"),
                    ("MCW-HE-MTR-250", "Rear hub motor, 250 W, exchange", "320.00", "Exchange"),
                    ("HE-PACK-504", "Battery 504 Wh", "540.00", "Current"),
                    ("HE-PACK-630", "Battery 630 Wh", "640.00", "Current"),
                    ("MCW-HE-CHG-4A", "Charger 4 A", "85.00", "Current"),
                    ("MCW-HE-BOOT-02", "Torque sensor cable boot, chainstay", "1.50", "Current"),
                    ("MCW-HE-MAG-01", "Speed sensor magnet", "4.50", "Current"),
                    ("MCW-HE-KEY-01", "Battery lock key blank", "6.00", "Cut to code"),
                    ("MCW-HE-FBG-01", "Fire-resistant battery transport bag", "22.00", "Current"),
                    (
                        "MCW-TK-DGL-01",
                        "Service dongle and cable (W)",
                        "120.00",
                        "Dealers with e-bike sign-off",
                    ),
                ],
            ),
            ("h3", "Batteries by post"),
            (
                "p",
                "Battery packs cannot be sent by post or parcel carrier. Dealers ordering a pack "
                "receive it by road freight in the fire-resistant bag, which must be kept and "
                "used if the pack is ever returned.",
            ),
            ("h3", "Battery keys"),
            (
                "p",
                "Replacement battery keys are cut to the code on the small tag supplied with the "
                "bike. Without the code we must replace the lock, which means sending the "
                "frame's battery lock assembly to us; the parts desk can quote for this.",
            ),
        ],
    ],
}

_WARRANTY = {
    "title": "Warranty Terms",
    "code": "POL-W version 6, effective 2025-04-01",
    "pages": [
        [
            ("h1", "Warranty Terms"),
            (
                "p",
                "Version 6, effective for bikes and parts bought from 2025-04-01. These terms "
                "explain what Marrowby Cycle Works promises if a bike or part we make turns out "
                "to be faulty. They are in addition to your rights under the law, which they do "
                "not reduce.",
            ),
            ("h2", "Who is covered"),
            (
                "p",
                "The warranty covers the person who bought the bike or part new from Marrowby "
                "Cycle Works or from one of our authorised dealers. It covers faults in "
                "materials and workmanship that show up during the periods below, when the bike "
                "has been used in the normal way for which it was designed and has been "
                "maintained as the owner's guide describes.",
            ),
            ("h2", "How long each part is covered"),
            (
                "table",
                (95, 75),
                [
                    ("Part", "Warranty period"),
                    ("Tern 700 steel frame and fork", "Lifetime of the original owner"),
                    ("Cobble and Halden E aluminium frames", "5 years"),
                    ("Brisk 24 frame and fork", "3 years"),
                    ("Halden E hub motor and C3 controller", "3 years"),
                    (
                        "Halden E battery pack",
                        "2 years or 500 full charge cycles, whichever comes first",
                    ),
                    ("HB1 and HB2 brakes, hubs, wheels and other Marrowby parts", "2 years"),
                    ("Paint and finish", "1 year"),
                    (
                        "Bought-in parts not made by us",
                        "2 years, handled by us on the maker's behalf",
                    ),
                ],
            ),
            (
                "p",
                "Periods run from the date of delivery to the first owner. A part repaired or "
                "replaced under warranty is covered for the rest of the original period, or for "
                "six months, whichever is longer.",
            ),
            ("h2", "What counts as a battery fault"),
            (
                "p",
                "A battery pack is treated as faulty if, within its warranty period, it holds "
                "less than 70 percent of its rated capacity when measured with our workshop "
                "capacity test, or if it fails to charge or switch on. Gradual loss of capacity "
                "above 70 percent is normal ageing and is not a fault.",
            ),
        ],
        [
            ("h2", "What the warranty does not cover"),
            (
                "li",
                "Parts that wear out in normal use: tyres, tubes, brake pads, rotors, chains, "
                "cassettes, chainrings, cables, bar tape, grips and saddles, unless they were "
                "faulty when new.",
            ),
            (
                "li",
                "Damage from crashes, falls, impacts, overloading beyond the limits in the "
                "technical manual, or from the bike being dropped or carried badly, including "
                "on a car rack.",
            ),
            (
                "li",
                "Damage caused by poor maintenance, by work that was not done to our "
                "procedures, or by parts that are not compatible with the bike.",
            ),
            (
                "li",
                "Corrosion that follows from leaving salt, sweat or dirt on the bike, or from "
                "damaged paint that was not touched up.",
            ),
            (
                "li",
                "Batteries that have been left discharged for a long time, charged with a "
                "charger other than ours, or opened by anyone other than us.",
            ),
            (
                "li",
                "Loss of assist, damage to the motor or controller, or any fault in the drive "
                "system on a Halden E that has been fitted with a device or software that "
                "changes its speed limit or power. Fitting such a device ends the warranty on "
                "the motor, controller and battery.",
            ),
            (
                "li",
                "Racing, jumps, stunts and off-road use beyond smooth tracks, except on the "
                "Cobble trail version, which may be ridden on forest roads and gravel paths.",
            ),
            ("li", "Damage in transit that was not reported within 48 hours of delivery."),
            ("h2", "Commercial and shared use"),
            (
                "p",
                "Bikes used commercially - for rental, hire schemes, courier or delivery work - "
                "are covered for one year on every part, including the frame, from the date of "
                "delivery. Bikes owned by a business and lent to its own staff for commuting are "
                "not treated as commercial use. If you are unsure whether your use is "
                "commercial, ask us before you buy.",
            ),
            ("h2", "Modifications"),
            (
                "p",
                "Fitting accessories that the bike was designed for, such as our racks, "
                "mudguards and lights, does not affect the warranty. Drilling, filing, welding "
                "or heating the frame or fork, or repainting it, ends the warranty on that "
                "part.",
            ),
        ],
        [
            ("h2", "How to make a claim"),
            (
                "p",
                "If you bought from a dealer, take the bike back to the dealer, who will make "
                "the claim for you. If you bought from us directly, contact our customer service "
                "team. You will need proof of purchase, the frame serial number and photographs "
                "of the fault. We may ask to examine the bike or the part; if so we pay for the "
                "carriage to and from our workshop.",
            ),
            ("h2", "What we will do"),
            (
                "p",
                "We decide on every claim within ten working days of receiving everything we "
                "need. If we accept the claim, we will at our choice repair the part, replace it "
                "with the same or an equivalent part, or, where neither is possible, refund what "
                "you paid for the part. Labour for warranty repairs is free for the first two "
                "years after delivery; after that, labour for a frame replacement under the "
                "lifetime warranty is charged at half the normal rate.",
            ),
            (
                "p",
                "If a replacement frame of the same model and colour is no longer made, we will "
                "offer the closest current model and colour at no extra cost. We cannot promise "
                "an exact colour match for frames replaced after the first year.",
            ),
            ("h2", "Crash replacement"),
            (
                "p",
                "Crash damage is not a warranty fault. As a goodwill offer, an original owner "
                "whose Tern 700 frame or fork is damaged in a crash can buy a replacement frame "
                "and fork at 30 percent off the list price, once, within five years of the "
                "original purchase. The damaged frame must be returned to us.",
            ),
            ("h2", "If you disagree with our decision"),
            (
                "p",
                "Ask for the reasons in writing, which we will always give. You can ask for the "
                "claim to be reviewed by the quality engineering manager, who was not involved "
                "in the first decision. The review is completed within 15 working days. This "
                "does not affect your legal rights.",
            ),
        ],
        [
            ("h2", "When the bike changes hands"),
            (
                "p",
                "The lifetime warranty on a Tern 700 frame and fork belongs to the original "
                "owner. If the bike is sold, the new owner receives the remainder of a five-year "
                "frame warranty from the original purchase date, as long as they register the "
                "bike in their own name within 30 days of buying it, using the frame serial "
                "number and the original proof of purchase. All other parts pass to the new "
                "owner for whatever remains of their normal periods. Warranty on a Halden E "
                "battery does not transfer to a second owner unless the bike is under two years "
                "old and the pack passes our capacity test at the time of the sale.",
            ),
            ("h2", "Gifts"),
            (
                "p",
                "A bike bought as a gift is treated as owned by the person who rides it, if the "
                "buyer and the rider are named together when the bike is registered.",
            ),
            ("h2", "Registering your bike"),
            (
                "p",
                "Registration is not needed for the warranty for a first owner, but it lets us "
                "contact you directly if a safety notice affects your bike. Register from your "
                "account on our website or ask your dealer to do it at the time of sale.",
            ),
            ("h2", "Parts bought separately"),
            (
                "p",
                "Spare parts bought on their own and fitted by a trained mechanic carry the same "
                "periods as the table on page 1, from the date the part was bought. Keep the "
                "receipt together with the bike's own paperwork.",
            ),
            ("h2", "Contact"),
            (
                "p",
                "Marrowby Cycle Works, Unit 4, Tanner's Yard, Marrowby. Customer service is open "
                "on working days from 09:00 to 17:00. Warranty questions from dealers go through "
                "the trade portal.",
            ),
            ("h2", "Changes to these terms"),
            (
                "p",
                "We may change these terms for bikes sold in future. The terms that apply to "
                "your bike are the ones in force on the day it was delivered to its first "
                "owner.",
            ),
        ],
    ],
}

PDFS: dict[str, dict] = {
    "manuals/hb2-brake-service.pdf": _HB2_MANUAL,
    "manuals/halden-e-service-manual.pdf": _HALDEN_MANUAL,
    "manuals/tern-700-frame-manual.pdf": _TERN_MANUAL,
    "manuals/wheel-building-guide.pdf": _WHEEL_GUIDE,
    "catalogue/parts-catalogue-2026.pdf": _CATALOGUE,
    "policies/warranty-terms.pdf": _WARRANTY,
}


# --------------------------------------------------------------------------------------------
# Document data: Word documents
# --------------------------------------------------------------------------------------------

_HB2_FITTING = {
    "title": "AP-14 Fitting HB2 hydraulic brakes on the assembly line",
    "blocks": [
        ("h1", "Fitting HB2 hydraulic brakes on the assembly line"),
        (
            "p",
            "Assembly procedure AP-14, revision E, effective 2025-06-09. Owner: Bram Tilluck. "
            "This revision takes in the caliper bolt change from ECN-0141.",
        ),
        ("h2", "Scope"),
        (
            "p",
            "This procedure covers fitting HB2 levers, hoses and calipers to new Halden E, "
            "Cobble Plus and Tern 700 disc bikes on assembly lines 2 and 3. HB2 brakes arrive "
            "from stores pre-filled and pre-bled, with the hose uncut and a transport spacer "
            "between the pads. Servicing and bleeding brakes on customer bikes is covered by the "
            "HB2 service manual, not by this procedure.",
        ),
        ("h2", "Parts and tools"),
        (
            "bullet",
            "HB2 brake set for the model, with front hose MCW-HB2-HOSE-1200 and rear hose "
            "MCW-HB2-HOSE-1800",
        ),
        ("bullet", "Four pre-coated caliper bolts MCW-BLT-M6-18TL per bike"),
        ("bullet", "New olives MCW-HB2-OLV-05 and inserts MCW-HB2-INS-05 for each hose cut"),
        ("bullet", "Torque wrench 2 to 10 Nm with its yellow 8 Nm tag, hose cutter, insert driver"),
        ("bullet", "Bleed kit for the short top-up after cutting"),
        ("h2", "Lever layout"),
        (
            "p",
            "Our standard layout is the right-hand lever for the front brake and the left-hand "
            "lever for the rear. Orders marked REVERSED on the build sheet, which are mostly for "
            "riders who learned to ride abroad, have the left lever on the front brake. Check "
            "the build sheet before you start: a reversed bike must have its hoses swapped at "
            "the lever end before any hose is cut.",
        ),
        ("h2", "Procedure"),
        ("h3", "Mounting the levers"),
        (
            "steps",
            [
                "Slide the levers onto the bar inboard of the grips, leaving a 5 mm gap to the "
                "grip.",
                "Set the lever angle so that the blades continue the line of the rider's forearm "
                "when "
                "seated, roughly 30 degrees below the horizontal on a flat bar.",
                "Tighten the lever clamp bolts to 3 Nm. The levers must still turn on the bar in a "
                "fall.",
                "Check the lot number on the underside of each lever. Levers from lots L2411 to "
                "L2502 "
                "must carry the green SN-2025-03 dot; send any without it back to stores.",
            ],
        ),
        ("h3", "Routing the hoses"),
        (
            "steps",
            [
                "Route the front hose down the left side of the fork to the front caliper.",
                "Route the rear hose along the frame following the model drawing: top tube on the "
                "Tern "
                "700, inside the down tube on the Halden E, under the down tube on the Cobble "
                "Plus.",
                "Turn the bar fully to each side. No hose may pull tight or press on the head "
                "tube.",
                "Fix the hoses in every clip on the drawing; do not add extra cable ties.",
            ],
        ),
        ("h3", "Mounting the calipers"),
        (
            "steps",
            [
                "Remove the transport spacer and check the pads are clean.",
                "Fit each caliper with two new pre-coated bolts MCW-BLT-M6-18TL. Never refit a "
                "bolt "
                "that has been screwed in before.",
                "Centre the caliper by holding the lever firmly while you snug the bolts, then "
                "tighten "
                "them to 8 Nm, alternating between the two bolts.",
                "Spin the wheel and check for rub with a white card behind the rotor.",
            ],
        ),
        ("h3", "Cutting hoses to length"),
        (
            "steps",
            [
                "Find the finished hose length in the table below for the model and size.",
                "Undo the hose nut at the lever, measure from the caliper end and cut square with "
                "the "
                "hose cutter.",
                "Fit a new insert and olive, reconnect at the lever and tighten the hose nut to 5 "
                "Nm.",
                "Do a short top-up bleed at the lever as in the service manual, then check the "
                "bite "
                "point.",
            ],
        ),
        ("h2", "Finished hose lengths"),
        (
            "p",
            "Lengths are measured from the face of the caliper fitting to the face of the lever "
            "fitting. They suit the standard stem and bar; add the difference in stem length for "
            "a custom stem.",
        ),
        (
            "table",
            [
                ("Model", "Size", "Front hose, mm", "Rear hose, mm"),
                ("Tern 700", "50", "780", "1480"),
                ("Tern 700", "53", "790", "1510"),
                ("Tern 700", "56", "800", "1540"),
                ("Tern 700", "59", "815", "1570"),
                ("Tern 700", "62", "830", "1600"),
                ("Halden E", "S", "820", "1650"),
                ("Halden E", "M", "840", "1690"),
                ("Halden E", "L", "860", "1730"),
                ("Cobble Plus", "S", "760", "1420"),
                ("Cobble Plus", "M", "770", "1450"),
                ("Cobble Plus", "L", "790", "1480"),
            ],
        ),
        ("h2", "Checks before the bike leaves the stand"),
        ("bullet", "Each lever reaches a firm bite point at least 20 mm before the bar."),
        ("bullet", "No fluid on the hose nuts, caliper or rotor; wipe with alcohol if in doubt."),
        ("bullet", "Torque values written on the job card, including the 8 Nm caliper bolts."),
        ("bullet", "Pads bedded in during the road test of the final inspection, not on the line."),
        ("h2", "Common mistakes"),
        (
            "p",
            "The mistakes that most often send a bike back from final inspection are a hose cut "
            "for the wrong frame size, a lever fitted without the SN-2025-03 dot, and a rear "
            "caliper bolted up without holding the lever, which leaves the pads rubbing. Take "
            "the extra minute to check.",
        ),
    ],
}

_TRUING = {
    "title": "WP-09 Wheel truing procedure",
    "blocks": [
        ("h1", "Wheel truing procedure"),
        (
            "p",
            "Workshop procedure WP-09, revision C, 2025-05-12. Owner: Fenn Ashgrove. Applies to "
            "the repair bay and to the final check of new wheels. Building new wheels is covered "
            "by the wheel building guide WG-01.",
        ),
        ("h2", "Purpose"),
        (
            "p",
            "A wheel that is out of true rubs on brakes and frames, wears tyres unevenly and "
            "carries load badly, which leads to broken spokes. This procedure sets how true a "
            "wheel must be and how the truing is done and recorded, so that every mechanic "
            "returns a wheel in the same condition.",
        ),
        ("h2", "Tolerances"),
        (
            "p",
            "Measure runout with the dial indicator on the truing stand, not by eye against the "
            "caliper arms. New build tolerances apply to wheels built in our workshop; service "
            "tolerances apply to wheels that have been ridden.",
        ),
        (
            "table",
            [
                ("Check", "New build", "Service wheel"),
                ("Lateral runout", "0.3 mm", "0.5 mm"),
                ("Radial runout", "0.3 mm", "0.5 mm"),
                ("Lateral runout, Halden E motor wheel", "0.4 mm", "0.6 mm"),
                ("Dish, rim centre to locknuts", "0.5 mm", "1.0 mm"),
                ("Spread of spoke tension on one side", "within 10 percent", "within 20 percent"),
            ],
        ),
        ("h2", "Before truing"),
        (
            "steps",
            [
                "Remove the tyre and tube, or the tubeless tyre, so that the rim can be seen all "
                "the "
                "way round.",
                "Check the hub bearings for play and roughness. Bearings are serviced before the "
                "wheel "
                "is trued.",
                "Check the rim for cracks at every spoke hole and for dents in the braking "
                "surface or "
                "bead seat.",
                "Check every spoke for bends, broken threads or damaged nipples, and mark any to "
                "be "
                "replaced.",
                "Oil each nipple where it enters the rim on wheels more than two years old.",
            ],
        ),
        ("h2", "Truing steps"),
        (
            "steps",
            [
                "Set the wheel in the stand and bring the indicator to the rim sidewall.",
                "Correct lateral runout first, working on the largest error, with no more than a "
                "quarter turn per nipple at a time.",
                "Correct radial runout: tighten both sides at a high spot, loosen both sides at a "
                "low "
                "spot.",
                "Check the dish with the dishing gauge from both sides and correct it by moving "
                "the "
                "whole rim.",
                "Check the tension of every spoke with the tension meter and even out any spoke "
                "outside the limit.",
                "Stress relieve by squeezing pairs of spokes, then repeat the lateral check.",
            ],
        ),
        ("h2", "Spokes that must be replaced"),
        (
            "p",
            "Replace a spoke that is bent at the elbow, has a damaged thread, or winds up and "
            "will not turn in its nipple after oiling. Replace the nipple at the same time. When "
            "two or more spokes on the drive side of a rear wheel have broken at the elbow in "
            "the last year, replace all the spokes on that side, because the others are likely "
            "to follow.",
        ),
        ("h2", "When to refer the wheel"),
        (
            "p",
            "Pass the wheel to a wheel builder instead of truing it yourself when any of the "
            "following applies: a rim with a crack, a dent that gives more than 1 mm of radial "
            "runout by itself, more than three spokes to replace, any Halden E motor wheel "
            "needing new spokes, or a customer's own custom build. Write the reason on the job "
            "card.",
        ),
        ("h2", "Recording"),
        (
            "p",
            "Write on the job card the lateral and radial runout before and after truing, the "
            "number of spokes replaced and their length, and the time taken. The standard truing "
            "charge covers up to 30 minutes of work; if a wheel will take longer, the front "
            "counter must ask the customer before you go on.",
        ),
    ],
}

_BATTERY = {
    "title": "PR-31 Halden E battery handling and storage",
    "blocks": [
        ("h1", "Halden E battery handling and storage"),
        (
            "p",
            "Procedure PR-31, revision D, 2025-09-01. Owner: Teodor Vaskel. Reviewed by Perpetua "
            "Lune, health and safety. Applies to everyone who receives, stores, charges, fits or "
            "ships a Halden E battery pack, including the warehouse team.",
        ),
        ("h2", "Receiving new batteries"),
        (
            "steps",
            [
                "Check that each pack arrives in its sealed fire-resistant bag with the dangerous "
                "goods label and the transport test summary from Sandle & Rook Cells.",
                "Check the state of charge on the pack's own gauge. It must be between 30 and 50 "
                "percent: two LEDs lit. Refuse a delivery in which any pack is outside that "
                "window.",
                "Look for damage to the case, the rail or the contacts. A damaged pack is refused, "
                "even if the rest of the delivery is accepted.",
                "Book the packs in with their serial numbers and move them to the battery store "
                "the "
                "same day.",
            ],
        ),
        ("h2", "Storage"),
        (
            "p",
            "The battery store is the steel cabinet row in bay 5. Keep packs between 10 and 25 "
            "degrees, out of direct sunlight and away from the heaters. Store packs at between "
            "40 and 60 percent charge. No more than ten packs may be stored in one cabinet "
            "section. Packs in store are checked every eight weeks and charged back to half if "
            "they have dropped below 40 percent. Write the check on the card on the cabinet "
            "door.",
        ),
        ("h2", "Reading the battery gauge"),
        (
            "p",
            "Each pack has four green LEDs and a button on its side. Press the button to show "
            "the charge. The table gives what the gauge means and what to do.",
        ),
        (
            "table",
            [
                ("LEDs", "Charge", "Action"),
                ("4 lit", "76 to 100 percent", "Ready for delivery or a test ride"),
                ("3 lit", "51 to 75 percent", "Normal for a bike on the shop floor"),
                ("2 lit", "26 to 50 percent", "Normal for a new pack arriving from the supplier"),
                ("1 lit", "6 to 25 percent", "Charge before storage"),
                ("1 flashing", "5 percent or less", "Charge within 24 hours to protect the cells"),
                (
                    "All 4 flashing",
                    "Pack fault",
                    "Do not charge. Quarantine and tell the e-bike bay",
                ),
            ],
        ),
        ("h2", "Charging in the workshop"),
        (
            "p",
            "Charge packs only on the charging shelf in bay 5, with the MCW-HE-CHG-4A charger, "
            "and only while someone is in the building. The last person to leave checks the "
            "shelf and unplugs every charger. Never charge a pack that is colder than 5 degrees; "
            "bring it indoors and wait two hours first.",
        ),
        ("h2", "Damaged and suspect batteries"),
        (
            "steps",
            [
                "Treat a pack as damaged if it has been dropped or crashed, is swollen, smells, "
                "has "
                "got wet inside or shows all four LEDs flashing.",
                "Put it straight into the fire-safe cabinet in bay 5 with a red tag giving the "
                "date, "
                "the serial number and what happened.",
                "Tell the e-bike bay the same day. Do not open, charge or ship the pack.",
                "The e-bike bay decides whether the pack goes back to Sandle & Rook Cells for "
                "assessment or for disposal through the licensed recycler.",
            ],
        ),
        ("h2", "Sending a battery"),
        (
            "steps",
            [
                "Only packs that the e-bike bay has marked as safe to ship may be sent.",
                "Bring the pack to between 20 and 30 percent, one or two LEDs lit.",
                "Pack it in a fire-resistant bag MCW-HE-FBG-01 inside its own carton, with the "
                "dangerous goods label on two sides.",
                "Book it with Larkspur Freight for road transport. Never send a pack by post or "
                "parcel "
                "carrier.",
            ],
        ),
    ],
}

_FINAL_INSPECTION = {
    "title": "QC-02 Final inspection checklist",
    "blocks": [
        ("h1", "Final inspection checklist for new bikes"),
        (
            "p",
            "Quality procedure QC-02, revision H, 2025-08-18. Owner: Ines Quarrington. Every new "
            "bike is inspected against this checklist by a senior mechanic who did not build it, "
            "before it is boxed for delivery or handed to a customer at the counter.",
        ),
        ("h2", "How to use the checklist"),
        (
            "p",
            "Work through the sections in order and tick each line on the inspection sheet. A "
            "line that fails is written in red on the job card and the bike goes back to its "
            "builder, who corrects it. The inspector does not correct faults. A bike that fails "
            "the same line twice in a row is reported to the line leader.",
        ),
        ("h2", "Paperwork"),
        (
            "table",
            [
                ("Check", "Pass when"),
                ("Job card", "Builder's name, part numbers used and all torque values written in"),
                ("Frame serial", "Serial on the frame matches the build sheet and the box label"),
                ("Safety notices", "Any open notice for the model carried out and recorded"),
            ],
        ),
        ("h2", "Frame, fit and cockpit"),
        (
            "table",
            [
                ("Check", "Pass when"),
                ("Drop test", "Bike dropped 10 cm onto its tyres gives no rattle"),
                ("Bar and stem", "Bar square to the front wheel; levers level with each other"),
                (
                    "Headset",
                    "No knock with the front brake held; steering falls freely to each side",
                ),
                ("Seat post", "Minimum insertion line hidden inside the frame"),
                ("Paint", "No chips or scratches that are not already on the job card"),
            ],
        ),
        ("h2", "Brakes"),
        (
            "table",
            [
                ("Check", "Pass when"),
                ("Lever feel", "Firm bite point at least 20 mm before the bar on each lever"),
                ("Holding", "Wheel cannot be turned by hand with the lever fully held"),
                ("Rub", "No pad contact when the wheel is spun; white card check on discs"),
                ("Lever lot", "HB2 levers from lots L2411 to L2502 carry the green dot"),
                ("Rim brakes (Brisk 24)", "Pads toed in, clear of the tyre, 6 Nm"),
            ],
        ),
        ("h2", "Wheels and tyres"),
        (
            "table",
            [
                ("Check", "Pass when"),
                ("True", "No visible wobble against the frame or the pads"),
                ("Spokes", "No spoke noticeably slack when squeezed in pairs"),
                ("Pressure", "Set with the gauge to the middle of the model's pressure range"),
                ("Axles", "Thru-axles at 12 Nm; quick releases leave a mark on the palm"),
                ("Rim tape", "Quay rims have 21 mm tape, centred over every spoke hole"),
            ],
        ),
        ("h2", "Drivetrain"),
        (
            "table",
            [
                ("Check", "Pass when"),
                ("Shifting", "Clean shifts through every sprocket, up and down, on the stand"),
                ("Limits", "Chain cannot be pushed off either end when the shifter is forced"),
                ("Chain", "Correct length; no stiff links"),
                ("Chainring bolts", "Cobble: steel bolts with paint marks, 10 Nm"),
            ],
        ),
        ("h2", "Electrical checks for the Halden E"),
        (
            "table",
            [
                ("Check", "Pass when"),
                ("System test", "All steps pass in the service tool"),
                ("Firmware", "Controller shows 2.4; version written on the job card"),
                ("Fault log", "Log saved and cleared after the road test"),
                ("Battery", "Charged to at least 75 percent for handover, three LEDs or more"),
                ("Lights", "Front and rear lights work from the display"),
            ],
        ),
        ("h2", "Road test"),
        (
            "steps",
            [
                "Ride at least one lap of the yard, about 400 metres, and bed in the brakes on the "
                "way.",
                "Brake hard with each lever alone and check that the bike stops in a straight "
                "line.",
                "Change through all the gears under load, standing on the pedals for the lowest "
                "three.",
                "On a Halden E, ride part of a lap in each assist level and try walk assist.",
                "Listen for creaks and clicks; a bike that makes a noise on the road test fails "
                "it.",
            ],
        ),
        ("h2", "Signing off"),
        (
            "p",
            "The inspector signs the inspection sheet in green ink, which is kept only by "
            "inspectors, and enters the frame serial number in the system. Builders sign in "
            "black or blue. The sheet goes in the box with the bike for dealer deliveries, and a "
            "copy stays in the workshop file for seven years.",
        ),
    ],
}

_ECN_0141 = {
    "title": "ECN-0141 HB2 caliper mounting bolts",
    "blocks": [
        ("h1", "ECN-0141: HB2 caliper mounting bolts"),
        (
            "table",
            [
                ("Field", "Value"),
                ("Change notice", "ECN-0141"),
                ("Products", "All bikes with HB2 brakes: Halden E, Cobble Plus, Tern 700 disc"),
                ("Raised by", "Ines Quarrington, quality engineering"),
                ("Date raised", "2025-05-20"),
                ("Effective from", "2025-06-09"),
            ],
        ),
        ("h2", "Summary"),
        (
            "p",
            "The HB2 caliper is now fixed to the frame and fork with pre-coated bolts tightened "
            "to 8 Nm. The plain bolts tightened to 6 Nm with liquid threadlock applied by hand "
            "are withdrawn.",
        ),
        ("h2", "Reason for change"),
        (
            "p",
            "In the first three months of 2025 the warranty team received eleven reports of "
            "loose rear caliper bolts, all on the Halden E. In two cases a bolt had fallen out "
            "completely and the caliper had twisted on its remaining bolt; the riders noticed a "
            "grinding noise and stopped safely. Teardown showed two causes working together. "
            "First, the amount of liquid threadlock varied a great deal from one mechanic to "
            "another, and some bolts had almost none. Second, the rear hub motor of the Halden E "
            "passes more vibration into the rear brake mount than an ordinary hub, and 6 Nm did "
            "not give enough clamping force to resist it.",
        ),
        (
            "p",
            "A bolt with a factory-applied threadlock patch gives the same locking every time. "
            "Tests at Vennick Fasteners and in our own workshop showed that the pre-coated bolt "
            "at 8 Nm stayed tight after the equivalent of 20,000 km on the vibration rig, where "
            "the old bolt at 6 Nm loosened after about 3,000 km.",
        ),
        ("h2", "Affected parts"),
        (
            "table",
            [
                ("", "Before", "After"),
                ("Bolt part number", "MCW-BLT-M6-18", "MCW-BLT-M6-18TL"),
                (
                    "Thread locking",
                    "Liquid threadlock, applied by hand",
                    "Blue patch applied by the maker",
                ),
                ("Head marking", "None", "Small dot on the head"),
                ("Tightening torque", "6 Nm", "8 Nm"),
                ("Reuse", "Allowed with fresh threadlock", "Not allowed; new bolt each time"),
            ],
        ),
        ("h2", "Implementation"),
        ("h3", "Production"),
        (
            "steps",
            [
                "Stores collect all plain bolts and threadlock bottles from the assembly stands "
                "on the "
                "Friday before the effective date and hold them in quarantine.",
                "The workshop manager resets every 2 to 10 Nm torque wrench on the lines to 8 Nm "
                "and "
                "marks it with a yellow tag before the first build on the effective date.",
                "From the effective date every bike is built with the pre-coated bolts at 8 Nm.",
            ],
        ),
        ("h3", "Stock bikes"),
        (
            "p",
            "Halden E bikes built before the effective date and still in the warehouse have both "
            "rear caliper bolts replaced with pre-coated bolts at 8 Nm before they are shipped. "
            "Cobble Plus and Tern 700 stock is not reworked, because no loosening has been "
            "reported on those models.",
        ),
        ("h3", "Customer bikes"),
        (
            "p",
            "There is no recall. Any Halden E that visits a workshop for any reason has its rear "
            "caliper bolts checked; plain bolts are replaced with pre-coated bolts at 8 Nm at no "
            "charge to the customer.",
        ),
        ("h2", "Documents updated"),
        ("bullet", "Workshop torque reference card, revision E"),
        ("bullet", "HB2 service manual, revision D"),
        ("bullet", "Assembly procedure AP-14, revision E"),
        ("bullet", "Parts catalogue: MCW-BLT-M6-18 marked as superseded"),
        ("h2", "Approval"),
        (
            "p",
            "Approved by Odalys Fenwright, workshop manager, on 2025-05-28, after the rollout "
            "plan was agreed. Progress on the stock bikes will be reviewed on 2025-06-19.",
        ),
    ],
}

_ECN_0152 = {
    "title": "ECN-0152 Quay rim tape width",
    "blocks": [
        ("h1", "ECN-0152: Quay rim tape width"),
        (
            "table",
            [
                ("Field", "Value"),
                ("Change notice", "ECN-0152"),
                ("Products", "Wheels with Quay 700C rims: Tern 700 and Cobble"),
                ("Raised by", "Fenn Ashgrove, wheel building"),
                ("Date raised", "2025-08-28"),
                ("Effective from", "2025-09-15"),
            ],
        ),
        ("h2", "Summary"),
        (
            "p",
            "The rim tape fitted to all Quay 700C rims changes from 18 mm to 21 mm wide. The new "
            "tape covers the whole rim well, from one bead seat shoulder to the other.",
        ),
        ("h2", "Reason for change"),
        (
            "p",
            "Over the summer of 2025 customer service logged 31 complaints of repeated punctures "
            "on Tern 700 and Cobble bikes, and in 24 of them the hole was on the inner side of "
            "the tube, facing the rim. When the returned wheels were examined, the 18 mm tape "
            "had slid to one side of the rim well on most of them, leaving the sharp edge of a "
            "spoke hole bare. The Quay rim well is 19.5 mm wide, so an 18 mm tape has room to "
            "move, especially when a tyre is fitted with tyre levers. A 21 mm tape is pressed "
            "against both walls of the well and cannot shift.",
        ),
        ("h2", "Affected parts"),
        (
            "table",
            [
                ("Item", "Old", "New"),
                ("Rim tape part number", "MCW-RT-18", "MCW-RT-21"),
                ("Width", "18 mm", "21 mm"),
                ("Material", "Nylon", "Nylon, thicker"),
                ("Rims", "MCW-RIM-Q700-32H and -36H", "No change"),
            ],
        ),
        (
            "p",
            "The Loam 27 rim is not affected; it always uses 25 mm tubeless tape. The Brisk 24 "
            "rim is not affected.",
        ),
        ("h2", "Fitting the new tape"),
        (
            "steps",
            [
                "Clean the rim well and check every spoke hole edge for burrs.",
                "Start the tape at the valve hole, with the tape's valve hole lined up with the "
                "rim's.",
                "Stretch the tape into the well all the way round, so that it sits tight against "
                "both "
                "side walls.",
                "Check with a fingertip that no spoke hole edge can be felt through the tape.",
                "Fit the tyre by hand where possible; if you need tyre levers, keep them away "
                "from the "
                "valve area.",
            ],
        ),
        ("h2", "Service"),
        (
            "p",
            "When a Tern 700 or Cobble comes in with a puncture on the inner side of the tube, "
            "replace the rim tape with MCW-RT-21 on both wheels, free of charge, and record the "
            "old tape width on the job card. Remaining stock of MCW-RT-18 is scrapped, not used "
            "on other rims.",
        ),
        ("h2", "Approval"),
        ("p", "Reviewed by Ines Quarrington and approved by Odalys Fenwright on 2025-09-03."),
    ],
}

_RETURNS_PROCESSING = {
    "title": "WH-05 Processing customer returns",
    "blocks": [
        ("h1", "Processing customer returns in the warehouse"),
        (
            "p",
            "Warehouse procedure WH-05, revision B, 2025-10-01. Owner: Hollis Penderwick. Covers "
            "parcels and bikes sent back by customers for a refund or exchange. Warranty returns "
            "follow the warranty team's own procedure once they have been booked in.",
        ),
        ("h2", "Return numbers"),
        (
            "p",
            "Every return is authorised by customer service before it is sent, and gets a return "
            "number in the form RMA-YYMM-NNNN: the year and month the return was opened, then a "
            "running number that restarts each month. For example, RMA-2601-0042 is the 42nd "
            "return opened in January 2026. The number must be written on the outside of the "
            "parcel.",
        ),
        ("h2", "Receiving a return"),
        (
            "steps",
            [
                "Scan the return number on the parcel. If there is none, look for a packing note "
                "inside, then search by the customer's name.",
                "Photograph the parcel before opening if the outside is damaged.",
                "Open the parcel at the returns bench and check the contents against the return "
                "in the "
                "system.",
                "Grade each item using the table below and enter the grade.",
                "Move each item to the shelf or area for its grade the same day.",
            ],
        ),
        (
            "p",
            "Parcels with no return number and no way of identifying the customer go on the "
            "unknown returns shelf and are reviewed every Friday by customer service.",
        ),
        ("h2", "Grading returned items"),
        (
            "table",
            [
                ("Grade", "Condition", "What happens next"),
                ("A", "Unused, packaging sealed or as new", "Back to stock for sale as new"),
                (
                    "B",
                    "Unused, packaging opened or damaged",
                    "Sold as open box on the web shop at 15 percent off",
                ),
                (
                    "C",
                    "Used, marked or incomplete",
                    "Workshop decides: refurbish, sell as used or scrap",
                ),
                (
                    "F",
                    "Customer reports a fault",
                    "Passed to the warranty team, not refunded by the warehouse",
                ),
            ],
        ),
        (
            "p",
            "Only grade A and grade B items are refunded in full. Grade C items are refunded "
            "less a deduction agreed with customer service, or offered back to the customer.",
        ),
        ("h2", "Complete bikes"),
        (
            "steps",
            [
                "Unbox the bike in bay 1 and photograph it from both sides.",
                "Read the odometer on a Halden E; on other models judge use from the tyres, chain "
                "and "
                "brake pads.",
                "Ask a mechanic to inspect the bike and write the result on a returns job card.",
                "Apply the 10 percent restocking charge to change-of-mind returns; do not apply "
                "it to "
                "size exchanges or to returns that were our mistake.",
                "Bikes that pass go back to stock as ex-return and are sold through the workshop "
                "counter only.",
            ],
        ),
        ("h2", "Batteries"),
        (
            "p",
            "A returned Halden E battery, loose or in a bike, never goes on the returns shelf. "
            "It is taken straight to the fire-safe cabinet in bay 5 and the e-bike bay is told "
            "the same day. The pack is refunded only after the e-bike bay has checked it.",
        ),
        ("h2", "Refunds"),
        (
            "p",
            "The returns bench inspects every item within three working days of arrival. Once an "
            "item is graded, the refund is released in the system and reaches the customer "
            "within seven days. Refunds over 500 need the approval of Marit Olsbury, the "
            "customer service lead, or of her deputy.",
        ),
        ("h2", "Daily close"),
        (
            "p",
            "At the end of each day, no returned item may remain ungraded on the returns bench. "
            "Count the open returns and write the number on the warehouse whiteboard.",
        ),
    ],
}

DOCXS: dict[str, dict] = {
    "procedures/hb2-brake-fitting.docx": _HB2_FITTING,
    "procedures/wheel-truing-procedure.docx": _TRUING,
    "procedures/battery-handling.docx": _BATTERY,
    "procedures/final-inspection-checklist.docx": _FINAL_INSPECTION,
    "notices/ecn-0141-caliper-bolts.docx": _ECN_0141,
    "notices/ecn-0152-rim-tape.docx": _ECN_0152,
    "procedures/returns-processing.docx": _RETURNS_PROCESSING,
}
