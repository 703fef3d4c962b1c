//! Dashboard sign-in kept in the database, so that every `serve` process on it
//! knows the same sessions and they hold across restarts. Only SHA-256 digests
//! of the secrets are stored: reading the tables lets no one sign in.

use super::{Store, StoreError};

impl Store {
    /// Records a session (by its secret's digest) until `expires_at`, and drops
    /// the expired ones.
    pub async fn open_session(
        &self,
        token_sha256: &str,
        who: &str,
        now: i64,
        expires_at: i64,
    ) -> Result<(), StoreError> {
        let _w = self.write_lock().await;
        let mut tx = self.pool.begin().await?;
        sqlx::query("DELETE FROM dashboard_sessions WHERE expires_at <= $1").bind(now).execute(&mut *tx).await?;
        sqlx::query(
            "INSERT INTO dashboard_sessions (token_sha256, created_at, expires_at, operator_name) VALUES ($1, $2, $3, $4)",
        )
        .bind(token_sha256)
        .bind(now)
        .bind(expires_at)
        .bind(who)
        .execute(&mut *tx)
        .await?;
        tx.commit().await?;
        Ok(())
    }

    /// The name a session signed in with, when a session with this digest
    /// exists and has not expired.
    pub async fn session_who(&self, token_sha256: &str, now: i64) -> Result<Option<String>, StoreError> {
        Ok(sqlx::query_scalar(
            "SELECT operator_name FROM dashboard_sessions WHERE token_sha256 = $1 AND expires_at > $2",
        )
        .bind(token_sha256)
        .bind(now)
        .fetch_optional(&self.pool)
        .await?)
    }

    /// Records a one-time sign-in code (by its digest) until `expires_at`, and
    /// drops the expired ones.
    pub async fn mint_code(&self, code_sha256: &str, who: &str, now: i64, expires_at: i64) -> Result<(), StoreError> {
        let _w = self.write_lock().await;
        let mut tx = self.pool.begin().await?;
        sqlx::query("DELETE FROM dashboard_codes WHERE expires_at <= $1").bind(now).execute(&mut *tx).await?;
        sqlx::query("INSERT INTO dashboard_codes (code_sha256, expires_at, operator_name) VALUES ($1, $2, $3)")
            .bind(code_sha256)
            .bind(expires_at)
            .bind(who)
            .execute(&mut *tx)
            .await?;
        tx.commit().await?;
        Ok(())
    }

    /// Records what a dashboard session (signed in as `who`) did.
    pub async fn record_action(
        &self,
        at: i64,
        (session_sha256, who): (&str, &str),
        action: &str,
        detail: &str,
    ) -> Result<(), StoreError> {
        let _w = self.write_lock().await;
        sqlx::query(
            "INSERT INTO dashboard_actions (at, session_sha256, operator_name, action, detail) VALUES ($1, $2, $3, $4, $5)",
        )
        .bind(at)
        .bind(session_sha256)
        .bind(who)
        .bind(action)
        .bind(detail)
        .execute(&self.pool)
        .await?;
        Ok(())
    }

    /// Uses up a one-time code: the name it was minted for, when it existed
    /// and had not expired. A code works once, whichever process redeems it.
    pub async fn redeem_code(&self, code_sha256: &str, now: i64) -> Result<Option<String>, StoreError> {
        let _w = self.write_lock().await;
        let mut tx = self.pool.begin().await?;
        let who: Option<String> =
            sqlx::query_scalar("SELECT operator_name FROM dashboard_codes WHERE code_sha256 = $1 AND expires_at > $2")
                .bind(code_sha256)
                .bind(now)
                .fetch_optional(&mut *tx)
                .await?;
        let r = sqlx::query("DELETE FROM dashboard_codes WHERE code_sha256 = $1 AND expires_at > $2")
            .bind(code_sha256)
            .bind(now)
            .execute(&mut *tx)
            .await?;
        tx.commit().await?;
        Ok(who.filter(|_| r.rows_affected() == 1))
    }
}
