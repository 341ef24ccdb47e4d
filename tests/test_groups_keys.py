"""Composite series keys and attributes (monitor.groups.keys, monitor.groups.attributes)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.errors import ConfigError, SourceError, ValidationError
from monitor.groups.attributes import (attributes_long, attributes_wide, group_labels,
                                       merge_attributes, read_attributes)
from monitor.groups.keys import compose_series, join_key, key_attributes, split_key


@settings(max_examples=300, deadline=None)
@given(st.lists(st.text(alphabet=st.sampled_from("ab/\\ -é"), max_size=6), min_size=1, max_size=4))
def test_join_split_round_trip(parts):
    key = join_key(parts)
    assert split_key(key, len(parts)) == tuple(parts)


def test_separator_and_escape_written_as_documented():
    assert join_key(["1/2 litre", "elm-cross"]) == "1\\/2 litre/elm-cross"
    assert join_key(["a\\", "b"]) == "a\\\\/b"
    assert split_key("a\\\\/b") == ("a\\", "b")
    # two different part lists never give the same id
    assert join_key(["a/b", "c"]) != join_key(["a", "b/c"])


def test_split_rejects_dangling_escape_and_wrong_count():
    with pytest.raises(ValidationError, match="escape character"):
        split_key("tea\\")
    with pytest.raises(ValidationError, match="3 key part"):
        split_key("a/b/c", 2)


def test_compose_series_joins_in_the_given_order_and_flags_blank_parts():
    frame = pd.DataFrame({"sku": ["tea", "1/2 litre", "", None, "oat"],
                          "store": ["north", "elm\\cross", "south", "east", "   "]})
    keys = compose_series(frame, ["sku", "store"])
    assert keys.series.tolist() == ["tea/north", "1\\/2 litre/elm\\\\cross", "", "", ""]
    assert keys.blank["sku"].tolist() == [False, False, True, True, False]
    assert keys.blank["store"].tolist() == [False, False, False, False, True]
    assert keys.bad.tolist() == [False, False, True, True, True]
    back = compose_series(frame, ["store", "sku"]).series.tolist()
    assert back[0] == "north/tea"                      # order is the order given
    assert split_key(keys.series[1], 2) == ("1/2 litre", "elm\\cross")


def test_compose_series_numbers_and_single_column():
    frame = pd.DataFrame({"sku": ["tea", "tea"], "store": [12.0, 7.0]})
    assert compose_series(frame, ["sku", "store"]).series.tolist() == ["tea/12", "tea/7"]
    one = compose_series(pd.DataFrame({"series": ["a/b", "c"]}), ["series"])
    assert one.series.tolist() == ["a/b", "c"]          # one column: the id is the cell


def test_compose_series_missing_column_names_it():
    with pytest.raises(SourceError, match=r"\['store'\] not in the log"):
        compose_series(pd.DataFrame({"sku": ["a"]}), ["sku", "store"])
    with pytest.raises(ValueError, match="named twice"):
        compose_series(pd.DataFrame({"sku": ["a"]}), ["sku", "sku"])


def test_key_attributes_keep_every_part():
    attrs = key_attributes(["tea/north", "1\\/2 litre/south", "tea/north"], ["sku", "store"])
    assert attrs.to_dict("records") == [
        {"series": "tea/north", "sku": "tea", "store": "north"},
        {"series": "1\\/2 litre/south", "sku": "1/2 litre", "store": "south"}]


def test_read_attributes_and_group_labels(tmp_path):
    p = tmp_path / "attrs.csv"
    p.write_text("series,category,region\ntea/north,drinks,north\noat/north,cereal,\n"
                 "\nrye/south,cereal,south\n", encoding="utf-8")
    attrs = read_attributes(p)
    assert attrs["series"].tolist() == ["tea/north", "oat/north", "rye/south"]
    assert attrs["region"].tolist() == ["north", None, "south"]
    labels = group_labels(attrs, ["category", "region"])
    assert labels.tolist() == ["drinks/north", None, "cereal/south"]
    assert group_labels(attrs, ["category"]).tolist() == ["drinks", "cereal", "cereal"]
    with pytest.raises(ConfigError, match="no such attribute"):
        group_labels(attrs, ["tariff"])
    assert attributes_wide(attributes_long(attrs)).fillna("-").to_dict("records") == \
        attrs.fillna("-").to_dict("records")


def test_read_attributes_reports_every_problem_with_row_field_value_rule(tmp_path):
    p = tmp_path / "bad.csv"
    p.write_text("series,category\ntea,drinks\n,cereal\ntea,snacks\noat, cereal\nrye\n",
                 encoding="utf-8")
    with pytest.raises(ValidationError) as err:
        read_attributes(p)
    text = str(err.value)
    assert "4 problem(s)" in text
    assert "row 2: field 'series' = '': series must not be blank" in text
    assert "row 3: field 'series' = 'tea': series listed twice (first at row 1)" in text
    assert "row 4: field 'category' = ' cereal': no spaces around a value" in text
    assert "row 5: field 'line' = 'rye': 1 fields, the header has 2" in text
    q = tmp_path / "nohead.csv"
    q.write_text("name,category\nx,y\n", encoding="utf-8")
    with pytest.raises(ValidationError, match="needs a 'series' column"):
        read_attributes(q)
    r = tmp_path / "badname.csv"
    r.write_text("series,2nd tier\nx,y\n", encoding="utf-8")
    with pytest.raises(ValidationError, match="field '2nd tier'.*starts with a letter"):
        read_attributes(r)
    with pytest.raises(ConfigError, match="not found"):
        read_attributes(tmp_path / "none.csv")


def test_merge_attributes_file_and_keys_must_agree():
    keys = key_attributes(["tea/north", "oat/south"], ["sku", "store"])
    file_ok = pd.DataFrame({"series": ["tea/north", "oat/south"], "category": ["drinks", "cereal"],
                            "store": ["north", None]}, dtype=object)
    merged = merge_attributes(keys, file_ok)
    assert merged.to_dict("records") == [
        {"series": "tea/north", "sku": "tea", "store": "north", "category": "drinks"},
        {"series": "oat/south", "sku": "oat", "store": "south", "category": "cereal"}]
    file_bad = pd.DataFrame({"series": ["tea/north"], "store": ["south"]}, dtype=object)
    with pytest.raises(ValidationError, match="series 'tea/north': field 'store' = 'south': "
                                              "disagrees with the key part 'north'"):
        merge_attributes(keys, file_bad)
