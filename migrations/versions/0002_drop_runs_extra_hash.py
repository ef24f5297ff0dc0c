"""runs: drop extra_hash (never written: every run stores its manifest and positions only)

Ledgered digests of run rows stay valid: the ledger records which columns it digested, and a
column no longer present reads as null, which is what it always held.

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-03 09:00:00
"""
from alembic import op
import sqlalchemy as sa


revision = '0002'
down_revision = '0001'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table('runs', schema=None) as batch_op:
        batch_op.drop_constraint('fk_runs_extra_hash_objects', type_='foreignkey')
        batch_op.drop_column('extra_hash')


def downgrade() -> None:
    with op.batch_alter_table('runs', schema=None) as batch_op:
        batch_op.add_column(sa.Column('extra_hash', sa.String(length=64), nullable=True))
        batch_op.create_foreign_key('fk_runs_extra_hash_objects', 'objects', ['extra_hash'],
                                    ['hash'])
