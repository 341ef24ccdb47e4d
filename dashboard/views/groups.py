"""Groups page: compare the series of a group. The group's mean b with its band, the spread
between its series, each series' own b beside its pooled (partially pooled) b, sorted, and the
series that differ from their group (Benjamini-Hochberg at the store's false-discovery rate)."""

from __future__ import annotations

import streamlit as st

from dashboard import data, group_shaping, ui
from dashboard.safe_text import plain
from monitor.store import groups as sgroups


@st.cache_data(ttl=data.QUERY_TTL, show_spinner=False)
def _names(db: str) -> list[str]:
    return sgroups.attribute_names(data.get_store(db))


@st.cache_data(ttl=data.QUERY_TTL, show_spinner=False)
def _pooled(db: str, group_by: tuple[str, ...], fdr: float):
    return sgroups.pool_latest(data.get_store(db), list(group_by), fdr=fdr)


def _explain() -> None:
    st.caption(
        "Own b: the series' estimate from its own observations. Pooled b: the same series "
        "pulled toward its group's mean by an amount that depends on how noisy its own "
        "estimate is compared with the spread between the group's series (empirical Bayes; "
        "DerSimonian & Laird 1986, Efron & Morris 1975). A series with a wide band is pulled "
        "far, a precise one hardly at all. Pooled b is the better guess of a single series' b "
        "when series of a group are alike; it hides what is special about a series when they "
        "are not. 'Differs' marks series whose own b is confidently away from the mean of the "
        "rest of the group (false-discovery rate controlled over all series).")


def render() -> None:
    db = ui.require_db()
    st.title("Groups")
    names = _names(db)
    if not names:
        st.warning("This store has no series attributes. Give composite keys (`--series-col "
                   "sku --series-col store`) or an attributes file (`[series] attributes`) and "
                   "groups (`--group-col category`).")
        return
    c1, c2 = st.columns([3, 1])
    group_by = c1.multiselect("Group series by", options=names, default=names[:1],
                              key="gr_by", placeholder="choose attributes")
    fdr = c2.select_slider("False-discovery rate", options=[0.01, 0.05, 0.1, 0.2], value=0.05,
                           key="gr_fdr")
    if not group_by:
        st.info("Choose at least one attribute to group by.")
        return

    @st.fragment(run_every=ui.run_every())
    def live() -> None:
        with ui.store_guard():
            per_series, per_group = _pooled(db, tuple(group_by), float(fdr))
            table = group_shaping.group_table(per_group)
            st.subheader("Groups")
            st.dataframe(table, hide_index=True, key="gr_groups", column_config={
                "n_series": st.column_config.NumberColumn("series", format="%d"),
                "n_pooled": st.column_config.NumberColumn(
                    "with an estimate", format="%d",
                    help="Series with a standard error (not warming up); a group needs 3."),
                "mean": st.column_config.NumberColumn("group mean b", format="%.2f"),
                "mean_lo": st.column_config.NumberColumn("band low", format="%.2f"),
                "mean_hi": st.column_config.NumberColumn("band high", format="%.2f"),
                "tau": st.column_config.NumberColumn(
                    "spread (tau)", format="%.2f",
                    help="Between-series standard deviation of b in the group."),
                "n_differ": st.column_config.NumberColumn("differ", format="%d")})
            if not len(table):
                st.info("No series has a value for these attributes.")
                return
            chosen = st.selectbox("Group", options=table["group"].tolist(), key="gr_group")
            summary = per_group.set_index("group").loc[chosen].to_dict()
            members = group_shaping.members_table(per_series, chosen)
            st.caption(f"{len(members):,} series in {plain(chosen)}; {int(summary['n_differ'])} "
                       f"differ from the group at FDR {fdr:g}.")
            st.altair_chart(group_shaping.comparison_chart(members, summary),
                            use_container_width=True)
            dist = group_shaping.distribution_chart(members, summary)
            if dist is not None:
                st.altair_chart(dist, use_container_width=True)
            st.dataframe(members, hide_index=True, key="gr_members")
            _explain()

    live()


render()
