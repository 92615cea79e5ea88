"""fusion_state.blob: the learner's per-node arrays, packed (numpy .npz), instead of JSON per node

Revision ID: 0003
Revises: 0002
"""
from alembic import op
import sqlalchemy as sa


revision = '0003'
down_revision = '0002'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table('fusion_state') as batch_op:
        batch_op.add_column(sa.Column('blob', sa.LargeBinary(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table('fusion_state') as batch_op:
        batch_op.drop_column('blob')
