"""Free-text DICOM values are cleared of the patient's name and ID unless identifiers are asked for."""
from __future__ import annotations

import numpy as np
import pydicom

from reconaudit.checker.dicom_write import write_ct_series
from reconaudit.checker.identifiers import WITHHELD, identifier_words, withhold_words
from reconaudit.checker.load import discover, load_series
from reconaudit.checker.runner import series_id_for
from reconaudit.checker.volume import Volume


def test_words_of_a_person_name_and_id():
    assert identifier_words("QUILLON^MARETTA^B", "FH-220931") == ["FH-220931", "MARETTA", "QUILLON"]
    assert identifier_words("QA^WATER PHANTOM", None) == ["WATER PHANTOM"]
    assert identifier_words(None, "") == []


def test_whole_words_only_and_any_case():
    words = identifier_words("ANDO^REL", "4471")
    assert withhold_words("chest ando 4471 andover 44712", words) == f"chest {WITHHELD} {WITHHELD} andover 44712"
    assert withhold_words("ABDOMEN 1.25 STD", words) == "ABDOMEN 1.25 STD"
    phrase = identifier_words("QA^WATER PHANTOM", None)
    assert withhold_words("water phantom 5 mm; water 0 HU", phrase) == f"{WITHHELD} 5 mm; water 0 HU"


def _series(tmp_path, description: str, **kw):
    hu = np.full((3, 16, 16), -1000.0, np.float32)
    hu[:, 4:12, 4:12] = 40.0
    vol = Volume.from_array(hu, (2.5, 0.7, 0.7))
    write_ct_series(vol, tmp_path / "s", series_description=description,
                    patient_name="VELLACOTT^ORIN", patient_id="FH-0087", **kw)
    return discover([tmp_path / "s"]).series[0]


def test_description_ids_and_metadata_withhold_the_name(tmp_path):
    src = _series(tmp_path, "CHEST Vellacott FH-0087 1.25")
    assert "vellacott" not in src.description.lower() and "FH-0087" not in src.description
    assert src.description == f"CHEST {WITHHELD} {WITHHELD} 1.25"
    assert "ellacott" not in series_id_for(src.description, src.key).lower()
    vol = load_series(src)
    assert vol.metadata["series_description"] == f"CHEST {WITHHELD} {WITHHELD} 1.25"
    assert vol.identifiers == {}


def test_identifiers_asked_for_keep_the_description(tmp_path):
    src = _series(tmp_path, "CHEST Vellacott 1.25")
    vol = load_series(src, include_identifiers=True)
    assert vol.metadata["series_description"] == "CHEST Vellacott 1.25"
    assert vol.identifiers["patient_name"] == "VELLACOTT^ORIN"


def test_a_non_ascii_name_does_not_stop_the_quick_read(tmp_path):
    src = _series(tmp_path, "HEAD Zoë 2.5")
    path = sorted(src.files)[0]
    ds = pydicom.dcmread(path)
    ds.SpecificCharacterSet = "ISO_IR 100"
    ds.PatientName = "ZOË^ARRAN"
    ds.save_as(path)
    src = discover([tmp_path / "s"]).series[0]
    assert WITHHELD in src.description
