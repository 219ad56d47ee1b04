//! The engine benchmark: orchestration overhead per task against a bare spawn, the time
//! to reopen a long campaign, and the engine's peak memory.

pub fn run(_json: bool, _tasks: u32) -> anyhow::Result<u8> {
    anyhow::bail!("the engine benchmark is being written")
}
