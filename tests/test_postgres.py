"""The same replay, unchanged, against the PostgreSQL server on 127.0.0.1:5432 (database test).

CI makes sure the server runs; when it does not, this test fails rather than skips.
"""

import pytest
from sqlalchemy import select

from hemostream import query
from hemostream.replay import replay_file
from hemostream.store import TABLES, open_engine


pytestmark = pytest.mark.postgres


def test_replay_into_postgresql_matches_sqlite(handmade, pg_url, db_url):
    a = replay_file(handmade, pg_url)
    b = replay_file(handmade, db_url)
    assert a.as_dict() | {"seconds": 0, "db_url": "", "messages_per_s": 0} == \
        b.as_dict() | {"seconds": 0, "db_url": "", "messages_per_s": 0}
    pg, lite = open_engine(pg_url, create=False), open_engine(db_url, create=False)
    for kind in ("observations", "derived", "rejected", "notes", "admissions"):
        assert list(query.rows(pg, kind)) == list(query.rows(lite, kind)), kind
    # restart over the same PostgreSQL database: everything is a duplicate now
    again = replay_file(handmade, pg_url)
    assert again.messages == 0 and again.duplicates == a.messages + a.duplicates
    with pg.connect() as c:
        assert len(c.execute(select(TABLES["messages"])).all()) == a.messages
    pg.dispose()
    lite.dispose()
