//! Dashboard sign-in kept in the database, so that every `serve` process on it
//! knows the same sessions and they hold across restarts. Only SHA-256 digests
//! of the secrets are stored: reading the tables lets no one sign in.

use super::{Store, StoreError};

impl Store {
    /// Records a session (by its secret's digest) until `expires_at`, and drops
    /// the expired ones.
    pub async fn open_session(&self, token_sha256: &str, now: i64, expires_at: i64) -> Result<(), StoreError> {
        let _w = self.write_lock().await;
        let mut tx = self.pool.begin().await?;
        sqlx::query("DELETE FROM dashboard_sessions WHERE expires_at <= $1").bind(now).execute(&mut *tx).await?;
        sqlx::query("INSERT INTO dashboard_sessions (token_sha256, created_at, expires_at) VALUES ($1, $2, $3)")
            .bind(token_sha256)
            .bind(now)
            .bind(expires_at)
            .execute(&mut *tx)
            .await?;
        tx.commit().await?;
        Ok(())
    }

    /// Whether a session with this digest exists and has not expired.
    pub async fn session_valid(&self, token_sha256: &str, now: i64) -> Result<bool, StoreError> {
        let n: i64 =
            sqlx::query_scalar("SELECT COUNT(*) FROM dashboard_sessions WHERE token_sha256 = $1 AND expires_at > $2")
                .bind(token_sha256)
                .bind(now)
                .fetch_one(&self.pool)
                .await?;
        Ok(n > 0)
    }

    /// Records a one-time sign-in code (by its digest) until `expires_at`, and
    /// drops the expired ones.
    pub async fn mint_code(&self, code_sha256: &str, now: i64, expires_at: i64) -> Result<(), StoreError> {
        let _w = self.write_lock().await;
        let mut tx = self.pool.begin().await?;
        sqlx::query("DELETE FROM dashboard_codes WHERE expires_at <= $1").bind(now).execute(&mut *tx).await?;
        sqlx::query("INSERT INTO dashboard_codes (code_sha256, expires_at) VALUES ($1, $2)")
            .bind(code_sha256)
            .bind(expires_at)
            .execute(&mut *tx)
            .await?;
        tx.commit().await?;
        Ok(())
    }

    /// Records what a dashboard session did.
    pub async fn record_action(
        &self,
        at: i64,
        session_sha256: &str,
        action: &str,
        detail: &str,
    ) -> Result<(), StoreError> {
        let _w = self.write_lock().await;
        sqlx::query("INSERT INTO dashboard_actions (at, session_sha256, action, detail) VALUES ($1, $2, $3, $4)")
            .bind(at)
            .bind(session_sha256)
            .bind(action)
            .bind(detail)
            .execute(&self.pool)
            .await?;
        Ok(())
    }

    /// Uses up a one-time code: true when it existed and had not expired. A
    /// code works once, whichever process redeems it.
    pub async fn redeem_code(&self, code_sha256: &str, now: i64) -> Result<bool, StoreError> {
        let _w = self.write_lock().await;
        let r = sqlx::query("DELETE FROM dashboard_codes WHERE code_sha256 = $1 AND expires_at > $2")
            .bind(code_sha256)
            .bind(now)
            .execute(&self.pool)
            .await?;
        Ok(r.rows_affected() == 1)
    }
}
