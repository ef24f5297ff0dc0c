"""ledger events: hash scheme 2 (payload digest, database session user)

Events written from now on record the SHA-256 of their payload and, on PostgreSQL, the
database session user; their hash covers both (scheme 2). Earlier events keep scheme 1 and
verify as before. The payload may be NULL only in a custody bundle, for an event it carries
reduced to its digest; the survey an event concerns stays named by id but is no longer a
foreign key, so a bundle can carry the events of surveys it does not hold.

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-10 09:00:00
"""
from alembic import op
import sqlalchemy as sa


revision = '0003'
down_revision = '0002'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table('ledger_events', schema=None) as batch_op:
        batch_op.add_column(sa.Column('db_user', sa.String(length=200), nullable=True))
        batch_op.add_column(sa.Column('payload_digest', sa.String(length=64), nullable=True))
        batch_op.add_column(sa.Column('scheme', sa.Integer(), server_default='1',
                                      nullable=False))
        batch_op.alter_column('payload', existing_type=sa.Text(), nullable=True)
        batch_op.drop_constraint('fk_ledger_events_survey_id_surveys', type_='foreignkey')


def downgrade() -> None:
    with op.batch_alter_table('ledger_events', schema=None) as batch_op:
        batch_op.create_foreign_key('fk_ledger_events_survey_id_surveys', 'surveys',
                                    ['survey_id'], ['id'])
        batch_op.alter_column('payload', existing_type=sa.Text(), nullable=False)
        batch_op.drop_column('scheme')
        batch_op.drop_column('payload_digest')
        batch_op.drop_column('db_user')
